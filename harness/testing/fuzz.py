"""Deterministic generator of hostile inputs for the frame decoder.

Mixes raw random bytes with mutations of valid frames (bit flips, byte
overwrites, truncation, extension, splices, duplicated spans).  Half of the
mutants get a recomputed CRC so the fields behind the CRC are exercised,
not only the CRC check.  Everything comes from one seeded generator.
"""

from __future__ import annotations

import random
from collections.abc import Iterator, Sequence

from ionotrail.terminal.limits import FRAME_CRC_BYTES, MAX_FRAME_BYTES
from ionotrail.terminal.wire.crc import crc16


def _fix_crc(data: bytes) -> bytes:
    if len(data) < FRAME_CRC_BYTES + 1:
        return data
    body = data[:-FRAME_CRC_BYTES]
    return body + crc16(body).to_bytes(FRAME_CRC_BYTES, "big")


def _mutate(rng: random.Random, data: bytes, corpus: Sequence[bytes]) -> bytes:
    out = bytearray(data)
    for _ in range(rng.choice((1, 1, 1, 2, 3, 8))):
        op = rng.randrange(7)
        if op == 0 and out:  # flip one bit
            i = rng.randrange(len(out))
            out[i] ^= 1 << rng.randrange(8)
        elif op == 1 and out:  # overwrite a byte, favouring boundary values
            out[rng.randrange(len(out))] = rng.choice((0x00, 0xFF, 0x7F, 0x80, 0x0F, 0xF0, rng.randrange(256)))
        elif op == 2 and out:  # truncate
            del out[rng.randrange(len(out)) :]
        elif op == 3:  # extend
            out += rng.randbytes(rng.randrange(1, 40))
        elif op == 4 and out:  # delete a span
            i = rng.randrange(len(out))
            del out[i : i + rng.randrange(1, 8)]
        elif op == 5:  # splice with another frame
            other = rng.choice(corpus)
            out = out[: rng.randrange(len(out) + 1)] + bytearray(other[rng.randrange(len(other) + 1) :])
        elif out:  # duplicate a span
            i = rng.randrange(len(out))
            out[i:i] = out[i : i + rng.randrange(1, 16)]
    mutated = bytes(out)
    return _fix_crc(mutated) if rng.random() < 0.5 else mutated


def hostile_inputs(seed: int, count: int, corpus: Sequence[bytes]) -> Iterator[bytes]:
    """``count`` inputs: a third random bytes, the rest mutants of ``corpus``."""
    rng = random.Random(seed)
    for _ in range(count):
        roll = rng.random()
        if roll < 0.30:
            yield rng.randbytes(rng.randrange(0, MAX_FRAME_BYTES + 8))
        elif roll < 0.33:
            yield _fix_crc(rng.randbytes(rng.randrange(MAX_FRAME_BYTES - 4, 4 * MAX_FRAME_BYTES)))
        else:
            yield _mutate(rng, rng.choice(corpus), corpus)
