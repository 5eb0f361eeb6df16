"""Received bytes can raise only DecodeError, and never grow memory.

The fuzz count is 25,000 inputs in the default run and 250,000 under
``--hypothesis-profile=thorough``.
"""

from __future__ import annotations

import tracemalloc

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from ionotrail.harness.testing import strategies
from ionotrail.harness.testing.fuzz import hostile_inputs
from ionotrail.terminal.errors import DecodeError, Reason
from ionotrail.terminal.limits import MAX_FRAME_BYTES
from ionotrail.terminal.wire import (
    Ack,
    AckBlock,
    Command,
    CommandBlock,
    Fragment,
    Probe,
    Reply,
    ReplyStatus,
    decode,
    encode,
)

from tests.conftest import thorough

SEED_FRAMES = [
    encode(Probe(7, 4711)),
    encode(Probe(7, 4712, poll=0x0A31, ack=AckBlock(0x0A31, 9, ((0, 40), (80, 120))), command=CommandBlock(1, 2, b"\x03\x84"))),
    encode(Fragment(0x0A31, 7, 9, 40, bytes(range(200)), final=True, urgent=True)),
    encode(Fragment(0x0A31, 7, 9, 0, b"x")),
    encode(Ack(7, AckBlock(0x0A31, 9, tuple((10 * i, 10 * i + 5) for i in range(15))))),
    encode(Ack(7, AckBlock(0x0A31, 9, complete=True, downlink=True))),
    encode(Command(7, 0x0A31, CommandBlock(255, 1, bytes(64)))),
    encode(Reply(0x0A31, 7, 9, ReplyStatus.REFUSED, b"busy")),
]


def _payload_bytes(frame: object) -> int:
    """Total length of every bytes field, however deeply nested."""
    if isinstance(frame, bytes):
        return len(frame)
    if isinstance(frame, tuple):
        return sum(_payload_bytes(item) for item in frame)
    return 0


def _check(data: bytes) -> None:
    try:
        frame = decode(data)
    except DecodeError as exc:
        assert exc.message and isinstance(exc.reason, Reason)
        return
    # Accepted input: it re-encodes to itself, knows its length and holds no more than it was given.
    assert encode(frame) == data
    assert frame.wire_length == len(data)
    assert _payload_bytes(frame) <= min(len(data), MAX_FRAME_BYTES)


@pytest.mark.property
@given(st.binary(max_size=MAX_FRAME_BYTES + 20))
def test_random_bytes_raise_only_decode_errors(data: bytes) -> None:
    _check(data)


@pytest.mark.property
@given(strategies.frames, st.data())
def test_mutated_frames_raise_only_decode_errors(frame: object, data: st.DataObject) -> None:
    wire = bytearray(encode(frame))  # type: ignore[arg-type]
    for _ in range(data.draw(st.integers(1, 4))):
        i = data.draw(st.integers(0, len(wire) - 1))
        wire[i] = data.draw(st.integers(0, 255))
    _check(bytes(wire))


def test_fuzz_decoder() -> None:
    count = 250_000 if thorough() else 25_000
    accepted = 0
    for data in hostile_inputs(seed=20261201, count=count, corpus=SEED_FRAMES):
        try:
            decode(data)
            accepted += 1
        except DecodeError:
            pass
    print(f"fuzzed {count} inputs, {accepted} decoded as valid frames")
    assert accepted > 0  # the mutator reaches past the CRC check


def test_fuzz_inputs_check_the_full_invariant() -> None:
    for data in hostile_inputs(seed=7, count=3_000, corpus=SEED_FRAMES):
        _check(data)


def _peak(data: object) -> int:
    tracemalloc.start()
    tracemalloc.reset_peak()
    try:
        decode(data)  # type: ignore[arg-type]
    except DecodeError:
        pass
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return peak


# Interpreter workspace of one decode: construct parses recursively, and
# Python 3.11 allocates its frame stack in 16 KiB chunks, so a decode that
# fails deep inside a declaration may touch two or three chunks.  The bound is
# what matters: it does not depend on the input (measured peak here ~40 KB).
DECODE_WORKSPACE = 64 * 1024


def test_oversize_input_is_refused_without_copying() -> None:
    huge = bytes(1 << 20)  # 1 MiB claimed as a frame, allocated before tracing
    for data in (huge, bytearray(huge), memoryview(huge), bytes([0x12]) + huge, bytes([0x11]) + huge):
        # The exception and its message cost about 1 KB; one copy would cost 1 MiB.
        assert _peak(data) < 4096


def test_decode_memory_is_bounded_whatever_the_input() -> None:
    for frame in SEED_FRAMES:  # warm caches so they do not count against an input
        _peak(frame)
    hostile = list(hostile_inputs(seed=11, count=400, corpus=SEED_FRAMES))
    worst = max(_peak(data) for data in hostile)
    assert worst <= DECODE_WORKSPACE, f"decoding hostile input peaked at {worst} bytes"


@pytest.mark.thorough
@settings(max_examples=20_000)
@given(st.binary(max_size=MAX_FRAME_BYTES + 20))
def test_random_bytes_soak(data: bytes) -> None:
    _check(data)
