"""One fuzz harness for everything the project receives.

:func:`hostile_inputs` is the original deterministic generator of hostile
frames (raw random bytes and mutants of valid frames: bit flips, byte
overwrites, truncation, extension, splices, duplicated spans; half of the
mutants with a recomputed CRC so the fields behind it are exercised).

:data:`TARGETS` registers every consumer of received input by name: frames
over the air (the decoder and its fast paths), the two link endpoints fed
streams of frames, host-modem records and the serial line in both dialects,
scenario files, traces and the ``ionotrail decode`` command's readers.  A
:class:`Target` is a seed-corpus builder, a consumer taking bytes, and the
exception types that count as a clean refusal; anything else escaping the
consumer (including a broken invariant the consumer asserts) is a failure.
:func:`run` feeds a target ``count`` inputs from a generator seeded by
``seed`` and returns the outcomes by exception class; each failing input is
saved in the corpus directory (``tests/corpus/<target>/``) under its content
hash, where ``tests/test_fuzz.py`` replays it on every test run.

Adding a target is one consumer function and one :func:`register` call.

Run at scale: ``python -m ionotrail.harness.testing.fuzz --count N --workers 2
[--target NAME]`` prints one JSON object (counts, outcomes, rate, elapsed).
"""

from __future__ import annotations

import argparse
import concurrent.futures
import contextlib
import dataclasses
import hashlib
import io
import json
import math
import os
import random
import sys
import tempfile
import time
import traceback
import tracemalloc
import zlib
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any

from ionotrail.harness.channel.scenario import ScenarioError
from ionotrail.harness.cli.common import UserError
from ionotrail.terminal.errors import DecodeError
from ionotrail.terminal.limits import FRAME_CRC_BYTES, MAX_FRAME_BYTES, OUTCOMES_KEPT
from ionotrail.terminal.wire.crc import crc16

# --- the original frame mutator -------------------------------------------------------------


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


def hostile_frame(rng: random.Random, corpus: Sequence[bytes]) -> bytes:
    """One input of :func:`hostile_inputs`' mix, drawn from ``rng``."""
    roll = rng.random()
    if roll < 0.30:
        return rng.randbytes(rng.randrange(0, MAX_FRAME_BYTES + 8))
    if roll < 0.33:
        return _fix_crc(rng.randbytes(rng.randrange(MAX_FRAME_BYTES - 4, 4 * MAX_FRAME_BYTES)))
    return _mutate(rng, rng.choice(corpus), corpus)


# --- generic mutators: bytes and text ----------------------------------------------------------

_INTERESTING_16 = (0, 1, 0x7F, 0x80, 0xFF, 0x100, 0x7FFF, 0x8000, 0xFFFE, 0xFFFF)


def mutate_bytes(rng: random.Random, data: bytes, corpus: Sequence[bytes], tokens: Sequence[bytes] = ()) -> bytes:
    """A mutant of ``data``: :func:`_mutate`'s operations without the CRC repair,
    plus 16-bit boundary values, small additions and insertions of ``tokens``
    (byte strings that mean something to the consumer, e.g. delimiters)."""
    roll = rng.random()
    if roll < 0.6 or not data:
        out = bytearray(_mutate(rng, data, corpus) if corpus else data)
    else:
        out = bytearray(data)
    for _ in range(rng.choice((1, 1, 2, 4))):
        op = rng.randrange(4)
        if op == 0 and len(out) >= 2:  # a 16-bit boundary value, either byte order
            i = rng.randrange(len(out) - 1)
            out[i : i + 2] = rng.choice(_INTERESTING_16).to_bytes(2, rng.choice(("big", "little")))
        elif op == 1 and out:  # small arithmetic on a byte
            i = rng.randrange(len(out))
            out[i] = (out[i] + rng.choice((-2, -1, 1, 2))) & 0xFF
        elif op == 2 and tokens:  # a meaningful byte string, inserted or overwriting
            token = rng.choice(tokens)
            i = rng.randrange(len(out) + 1)
            out[i : i + (len(token) if rng.random() < 0.5 else 0)] = token
        elif op == 3 and out:  # repeat a span many times (long runs, overruns)
            i = rng.randrange(len(out))
            out[i:i] = out[i : i + rng.randrange(1, 4)] * rng.randrange(2, 300)
    return bytes(out)


def mutate_text(rng: random.Random, data: bytes, corpus: Sequence[bytes], tokens: Sequence[bytes] = ()) -> bytes:
    """A mutant of a line-oriented text (TOML, JSON lines): line operations
    (drop, duplicate, swap, splice from another seed), values replaced by
    ``tokens`` (boundary numbers, odd strings, deep nesting), characters
    inserted or removed; now and then a byte-level mutant (invalid UTF-8)."""
    if rng.random() < 0.1:
        return mutate_bytes(rng, data, corpus, tokens)
    lines = data.split(b"\n")
    for _ in range(rng.choice((1, 1, 2, 3, 6))):
        op = rng.randrange(9)
        i = rng.randrange(len(lines))
        line = lines[i]
        if op == 0 and len(lines) > 1:
            del lines[i]
        elif op == 1:
            lines.insert(i, line)
        elif op == 2:
            j = rng.randrange(len(lines))
            lines[i], lines[j] = lines[j], lines[i]
        elif op == 3 and corpus:
            other = rng.choice(corpus).split(b"\n")
            lines.insert(i, rng.choice(other))
        elif op in (4, 5) and tokens:  # a value, after "=" or ":", replaced by a token
            token = rng.choice(tokens)
            cuts = [k for k, c in enumerate(line) if c in b"=:,[{"]
            if cuts:
                k = rng.choice(cuts) + 1
                end = min((e for e in (line.find(c, k) for c in b",}]\n") if e >= 0), default=len(line))
                lines[i] = line[:k] + b" " + token + line[end:]
            else:
                lines[i] = line + b" = " + token
        elif op == 6 and tokens:  # a token anywhere
            k = rng.randrange(len(line) + 1)
            lines[i] = line[:k] + rng.choice(tokens) + line[k:]
        elif op == 7 and line:  # characters removed
            k = rng.randrange(len(line))
            lines[i] = line[:k] + line[k + rng.randrange(1, 6) :]
        elif line:  # one character replaced by a syntactically loaded one
            k = rng.randrange(len(line))
            lines[i] = line[:k] + rng.choice(b"\"'[]{}=.,:#\\ 0-9eE+\t").to_bytes(1, "big") + line[k + 1 :]
    return b"\n".join(lines)


# --- the registry ------------------------------------------------------------------------------

Mutator = Callable[[random.Random, bytes, Sequence[bytes], Sequence[bytes]], bytes]


@dataclasses.dataclass(frozen=True)
class Target:
    """One consumer of received input, and how to feed it."""

    name: str
    consume: Callable[[bytes], object]
    """Takes one input; raises one of ``allowed`` to refuse it, anything else is a failure."""
    seeds: Callable[[], list[bytes]]
    """Builds the seed corpus (valid inputs and a few interesting ones)."""
    allowed: tuple[type[BaseException], ...]
    """Exception types that are a clean refusal (the consumer's documented errors)."""
    mutate: Mutator = mutate_bytes
    tokens: tuple[bytes, ...] = ()
    """Byte strings the mutator inserts (delimiters, boundary values, keywords)."""
    weight: float = 1.0
    """Share of a mixed run, relative to the others (cost and value per input)."""
    memory_bound: int | None = None
    """Largest tracemalloc peak one input may cause, when sampled; None: not sampled."""
    doc: str = ""

    def generate(self, seed: int, count: int) -> Iterator[bytes]:
        """``count`` inputs, the same for the same seed: raw noise and mutants of the seeds."""
        corpus = self.seeds()
        rng = random.Random(f"{self.name}:{seed}")
        for _ in range(count):
            roll = rng.random()
            if roll < 0.05:
                yield rng.randbytes(rng.randrange(0, 2 * MAX_FRAME_BYTES))
            elif roll < 0.10:
                yield rng.choice(corpus)
            else:
                yield self.mutate(rng, rng.choice(corpus), corpus, self.tokens)


TARGETS: dict[str, Target] = {}


def register(target: Target) -> Target:
    if target.name in TARGETS:
        raise ValueError(f"fuzz target {target.name!r} registered twice")
    TARGETS[target.name] = target
    return target


# --- frames over the air -----------------------------------------------------------------------

TERMINAL, OTHER_TERMINAL, MASTER = 0x0A31, 0x0B00, 7


def frame_seeds() -> list[bytes]:
    from ionotrail.terminal.wire import (
        Ack,
        AckBlock,
        Command,
        CommandBlock,
        Fragment,
        Probe,
        Reply,
        ReplyStatus,
        encode,
    )

    return [
        encode(Probe(MASTER, 4711)),
        encode(
            Probe(
                MASTER,
                4712,
                poll=TERMINAL,
                ack=AckBlock(TERMINAL, 9, ((0, 40), (80, 120))),
                command=CommandBlock(1, 2, b"\x03\x84"),
            )
        ),
        encode(Probe(MASTER, 4713, ack=AckBlock(TERMINAL, 0, (), complete=True))),
        encode(Probe(MASTER, 4714, poll=OTHER_TERMINAL, ack=AckBlock(TERMINAL, 1, ((0, 64),)))),
        encode(Fragment(TERMINAL, MASTER, 9, 40, bytes(range(200)), final=True, urgent=True)),
        encode(Fragment(TERMINAL, MASTER, 9, 0, b"x")),
        encode(Fragment(TERMINAL, MASTER, 3, 0, b"\x01" * 60 + b"\x00\x00\x00\x00", final=True)),
        encode(Ack(MASTER, AckBlock(TERMINAL, 9, tuple((10 * i, 10 * i + 5) for i in range(15))))),
        encode(Ack(MASTER, AckBlock(TERMINAL, 9, complete=True, downlink=True))),
        encode(Ack(MASTER, AckBlock(TERMINAL, 0, refused=True))),
        encode(Command(MASTER, TERMINAL, CommandBlock(255, 1, bytes(64)))),
        encode(Reply(TERMINAL, MASTER, 9, ReplyStatus.REFUSED, b"busy")),
        encode(Reply(TERMINAL, MASTER, 0, ReplyStatus.OK, b"")),
    ]


def _frame_mutate(rng: random.Random, data: bytes, corpus: Sequence[bytes], tokens: Sequence[bytes]) -> bytes:
    return hostile_frame(rng, corpus) if rng.random() < 0.8 else _fix_crc(mutate_bytes(rng, data, corpus, tokens))


def consume_wire(data: bytes) -> None:
    """``wire.decode``; an accepted frame must re-encode to the same bytes and hold no more than it was given."""
    from ionotrail.terminal.wire import decode, encode

    frame = decode(data)
    if encode(frame) != data or frame.wire_length != len(data):
        raise AssertionError(f"decode accepted {data.hex()} but re-encodes it as {encode(frame).hex()}")


def consume_fastpath(data: bytes) -> None:
    """The fast decoders (fragment, probe, ack) on bytes carrying their head byte,
    against the construct declarations: the same frame, or the same error class."""
    from ionotrail.terminal.wire import fastpath
    from ionotrail.terminal.wire.codec import decode_with_construct

    if not data:
        return
    heads = {
        fastpath.HEAD_BYTE: fastpath.decode_fragment,
        fastpath.PROBE_HEAD: fastpath.decode_probe,
        fastpath.ACK_HEAD: fastpath.decode_ack,
    }
    if data[0] not in heads:  # steer the input to one fast path, keeping its CRC closed when it was
        head = tuple(heads)[data[0] % 3]
        data = bytes((head,)) + data[1:]
        if data[0] % 2:
            data = _fix_crc(data)
    fast_error = slow_error = None
    try:
        fast = heads[data[0]](data)
    except DecodeError as exc:
        fast_error = exc
    try:
        slow = decode_with_construct(data)
    except DecodeError as exc:
        slow_error = exc
    if type(fast_error) is not type(slow_error) or (fast_error is None and fast != slow):
        raise AssertionError(f"fast path and declaration disagree on {data.hex()}: {fast_error!r} vs {slow_error!r}")
    if fast_error is not None:
        raise fast_error


# --- the link endpoints, fed streams of frames ----------------------------------------------------
#
# A stream input is a run of items: one control byte (low 7 bits: the gap
# since the previous frame in 4 ms steps, so silences longer than the burst
# silence occur; the high bit: a strong or a weak signal), a 16-bit length and
# that many frame bytes.  A cut-short item takes what is left.


def stream_items(data: bytes) -> Iterator[tuple[float, float, bytes]]:
    """(gap in seconds, SNR in dB, frame) for each item of a stream input."""
    pos = 0
    while pos < len(data):
        control = data[pos]
        length = int.from_bytes(data[pos + 1 : pos + 3], "big")
        frame = data[pos + 3 : pos + 3 + length]
        pos += 3 + length
        yield (control & 0x7F) * 0.004, 25.0 if control & 0x80 else 4.0, frame


def pack_stream(items: Sequence[tuple[int, bytes]]) -> bytes:
    return b"".join(bytes((control,)) + len(frame).to_bytes(2, "big") + frame for control, frame in items)


def _stream_seeds() -> list[bytes]:
    frames = frame_seeds()
    probe, probe_command, probe_done = frames[0], frames[1], frames[2]
    return [
        pack_stream([(0x80, probe)] + [(0x80 | 25, f) for f in (probe, probe_command, probe, probe_done)]),
        pack_stream([(0x80 | (3 * k) % 128, f) for k, f in enumerate(frames)]),
        pack_stream([(0x80, frames[5]), (0x80, frames[4]), (0x80, frames[6]), (0x80, frames[11]), (0x7F, frames[12])]),
    ]


def _stream_mutate(rng: random.Random, data: bytes, corpus: Sequence[bytes], tokens: Sequence[bytes]) -> bytes:
    """Mostly a fresh stream of hostile frames; sometimes a mutant of the whole container."""
    if rng.random() < 0.15:
        return mutate_bytes(rng, data, corpus, tokens)
    frames = [frame for seed in corpus for _, _, frame in stream_items(seed) if frame]
    items = []
    for _ in range(rng.randrange(1, 24)):
        control = rng.choice((0x80 | 25, 0x80 | 2, 0x80 | rng.randrange(128), rng.randrange(256)))
        frame = rng.choice(frames) if rng.random() < 0.3 else hostile_frame(rng, frames)
        items.append((control, frame))
    return pack_stream(items)


def make_link(variant: int) -> Any:
    """A terminal's link with messages queued; ``variant`` picks the policy and duplex."""
    from ionotrail.terminal.delivery.sender import Sender
    from ionotrail.terminal.link.policy import Adaptive, Fixed, StopAndWait
    from ionotrail.terminal.link.terminal import Duplex, Link

    sender = Sender(TERMINAL, MASTER)
    for n in range(3):
        sender.queue(bytes([n + 1]) * (200 + 300 * n), 0.0)
    policy = (Fixed(64), Adaptive(4800.0), StopAndWait(48))[variant % 3]
    from ionotrail.harness.runners.keying import simulated_terminal

    duplex = Duplex.HALF if variant // 3 % 2 else Duplex.FULL
    return Link(sender, policy, bit_rate=4800.0, duplex=duplex, auth=simulated_terminal(0, TERMINAL))  # type: ignore[arg-type]


def _fire_link(link: Any, until: float) -> None:
    """Call the link's timer as its shell does, up to ``until``."""
    for _ in range(10_000):
        due = link.deadline
        if due is None or due > until:
            return
        link.on_timer(due)
        if link.deadline is not None and link.deadline <= due:
            raise AssertionError(f"link timer did not move on from {due} in state {link.state}")
    raise AssertionError("link timer fired 10,000 times without reaching the next frame")


def link_bounds(link: Any) -> None:
    """The terminal link's bounded structures within their limits."""
    limits = link.limits
    commands = link.commands
    checks = {
        "queued replies": (commands.queued, limits.max_queued_replies),
        "remembered commands": (commands.kept, limits.max_remembered_commands),
        "queued messages": (link.sender.pending, limits.max_queued_messages),
        "settled outcomes": (len(link.sender.outcomes), OUTCOMES_KEPT),
        "command window bits": (commands._seen.bit_length(), limits.command_window),
    }
    for name, (size, bound) in checks.items():
        if size > bound:
            raise AssertionError(f"terminal link holds {size} {name}, over its limit {bound}")


def feed_link(link: Any, data: bytes, start: float = 0.0) -> float:
    """Every frame of a stream input into ``link`` (timers fired between, commands answered); returns the last time."""
    from ionotrail.terminal.link.terminal import Arrival, CommandArrived
    from ionotrail.terminal.wire import ReplyStatus

    t = start
    for gap, snr, frame in stream_items(data):
        t += gap
        _fire_link(link, t)
        for effect in link.on_frame(Arrival(frame, t, snr)):
            if isinstance(effect, CommandArrived):
                link.reply(effect.command_id, ReplyStatus.OK, effect.arguments[:8])
        if link.unsaved:  # the shell's commit, in memory
            link.durable_batch()
            link.durable_committed()
    return t


def consume_link(data: bytes) -> None:
    """``Link.on_frame`` over a stream of frames: never raises; bounds hold after it."""
    link = make_link(zlib.crc32(data))
    t = feed_link(link, data)
    _fire_link(link, t + 1.0)
    link_bounds(link)


def make_master() -> Any:
    """A master endpoint with a command queued for each of two terminals.  Its
    command turn and reassembly lifetime are short, so that a stream of a few
    seconds sees turns rotate and partial messages expire."""
    from ionotrail.harness.runners.keying import simulated_site
    from ionotrail.terminal.auth.authenticator import MasterAuthenticator
    from ionotrail.terminal.limits import Limits
    from ionotrail.terminal.link.master import MasterEndpoint

    master = MasterEndpoint(MASTER, limits=Limits(command_turn=1.0, reassembly_lifetime=5.0), auth=MasterAuthenticator(simulated_site(0)))
    master.command(TERMINAL, 1, b"\x03\x84", 0.0)
    master.command(OTHER_TERMINAL, 2, b"", 0.0)
    return master


def _fire_master(master: Any, until: float) -> None:
    for _ in range(10_000):
        due = master.deadline
        if due is None or due > until:
            return
        master.on_timer(due)
        if master.deadline is not None and master.deadline <= due:
            raise AssertionError(f"master timer did not move on from {due}")
    raise AssertionError("master timer fired 10,000 times without reaching the next frame")


def master_bounds(master: Any) -> None:
    """The master endpoint's bounded structures within their limits."""
    limits = master.limits
    reassembler = master.reassembler
    checks = {
        "partial messages": (reassembler.partial_count, limits.max_partials_total),
        "reassembly bytes": (reassembler.buffered_bytes, limits.max_bytes_total),
        "duplicate windows": (len(reassembler.completed), limits.max_duplicate_sources),
        "acknowledgement news": (len(master._news), limits.max_ack_news),
        "queued commands": (len(master.pending_commands), limits.max_queued_commands),
        "aired commands": (len(master._aired), limits.max_queued_commands),
    }
    for source in {source for source, _ in reassembler.partials()}:
        checks[f"partials of {source}"] = (reassembler.partial_count_of(source), limits.max_partials_per_source)
        checks[f"bytes of {source}"] = (reassembler.buffered_bytes_of(source), limits.max_bytes_per_source)
    for name, (size, bound) in checks.items():
        if size > bound:
            raise AssertionError(f"master endpoint holds {size} {name}, over its limit {bound}")


def feed_master(master: Any, data: bytes, start: float = 0.0) -> float:
    t = start
    for gap, _, frame in stream_items(data):
        t += gap
        _fire_master(master, t)
        master.on_frame(frame, t)
    return t


def consume_master(data: bytes) -> None:
    """``MasterEndpoint.on_frame`` over a stream of frames: never raises; bounds hold after it."""
    master = make_master()
    t = feed_master(master, data)
    _fire_master(master, t + master.limits.reassembly_lifetime + 1.0)
    master_bounds(master)


def long_stream(endpoint: str, seed: int, frames: int, check_every: int = 1000) -> dict[str, Any]:
    """One endpoint (``link`` or ``master``) fed ``frames`` hostile frames in one
    long stream, its bounded structures checked every ``check_every`` frames and
    at the end.  A terminal link that has sent everything is given more to send."""
    target = TARGETS[endpoint]
    corpus = target.seeds()
    rng = random.Random(f"long:{endpoint}:{seed}")
    fed, t = 0, 0.0
    if endpoint == "link":
        node, feed, bounds = make_link(seed), feed_link, link_bounds
    else:
        node, feed, bounds = make_master(), feed_master, master_bounds
    while fed < frames:
        data = _stream_mutate(rng, rng.choice(corpus), corpus, target.tokens)
        fed += sum(1 for _ in stream_items(data))
        t = feed(node, data, t)
        if endpoint == "link" and node.sender.pending == 0:
            node.sender.queue(rng.randbytes(rng.randrange(1, 2000)), t)
        if fed // check_every != (fed - 1) // check_every:
            bounds(node)
    bounds(node)
    return {"endpoint": endpoint, "frames": fed, "simulated_s": round(t, 3)}


# --- the serial line: records, COBS, the dialects ---------------------------------------------


def record_seeds() -> list[bytes]:
    from ionotrail.terminal.modem import records as r

    frame = frame_seeds()[4]
    return [
        r.encode_record_body(record)
        for record in (
            r.Transmit(7, frame),
            r.ProbeStart(0.1, frame_seeds()[0]),
            r.ProbeStop(),
            r.Listen(True),
            r.Configure(40_520_000, 41_610_000, 4800, 25.0),
            r.StatusQuery(),
            r.Transmitted(7, True, 0.4),
            r.Received(12.5, 14.2, -81.0, frame),
            r.Received(3.0, math.nan, math.nan, b"\x00"),
            r.Status(99.0, -12.5, 12.6, r.PaState.ON, 0.25),
            r.Status(99.0, math.nan, math.nan, r.PaState.FAULT, math.nan),
            r.Reset(0.0, r.ResetReason.WATCHDOG),
            r.ErrorAnswer(r.ErrorCode.BAD_CRC, 3),
        )
    ]


def _record_mutate(rng: random.Random, data: bytes, corpus: Sequence[bytes], tokens: Sequence[bytes]) -> bytes:
    out = mutate_bytes(rng, data, corpus, tokens)
    return _fix_crc(out) if rng.random() < 0.6 else out


def consume_records(data: bytes) -> None:
    """``decode_record_body``; an accepted record encodes back, and that decodes to the same record."""
    from ionotrail.terminal.modem.records import decode_record_body, encode_record_body

    record = decode_record_body(data)
    again = decode_record_body(encode_record_body(record))
    if repr(again) != repr(record):
        raise AssertionError(f"record {data.hex()} decodes to {record!r}, which goes round to {again!r}")


def _chunks(data: bytes) -> list[bytes]:
    """``data`` cut in pieces of 1 to 64 bytes, the cuts drawn from the input's own CRC (replays exactly)."""
    rng = random.Random(zlib.crc32(data))
    pieces, pos = [], 0
    while pos < len(data):
        size = rng.choice((1, 1, 2, 3, 7, 16, 64))
        pieces.append(data[pos : pos + size])
        pos += size
    return pieces


def line_seeds(dialect_name: str) -> list[bytes]:
    from ionotrail.terminal.modem import records as r
    from ionotrail.terminal.modem.dialects import dialect

    line = dialect(dialect_name)
    frames = frame_seeds()
    records = [r.Received(1.0, 20.0, 5.0, f) for f in frames] + [r.Transmit(k, f) for k, f in enumerate(frames)]
    if dialect_name == "ionotrail":
        records += [r.Status(5.0, 20.0, 12.0, r.PaState.ON, 0.5), r.Reset(1.0, r.ResetReason.POWER_ON), r.ErrorAnswer(r.ErrorCode.MALFORMED, 1),
                    r.Transmitted(3, False, 0.1), r.Listen(False), r.ProbeStop()]  # fmt: skip
    encoded = [line.encode(record) for record in records]
    seeds = [b"".join(encoded[k : k + 4]) for k in range(0, len(encoded), 4)]
    seeds.append(b"\x00" * 3 + encoded[0] + b"\xc0\xc0" + encoded[-1])
    if dialect_name == "kiss":
        seeds += [
            b"\xc0\x01\x32\xc0\xc0\xff\xc0",
            b"\xc0\x10" + frames[0] + b"\xc0",
            b"\xc0\x00\xdb\xdc\xdb\xdd\xdb\xc0",
        ]
    return seeds


def _check_stream(side_name: str, dialect_name: str, data: bytes) -> None:
    """A record stream fed ``data`` in pieces: never raises, holds no more than
    one record, and gives what it gives when fed all at once."""
    from ionotrail.terminal.limits import MAX_KISS_FRAME_BYTES, MAX_SERIAL_PAYLOAD, cobs_encoded_max
    from ionotrail.terminal.modem.dialects import LineError, Side, dialect, error_answer

    side = Side(side_name)
    line = dialect(dialect_name)
    bound = MAX_KISS_FRAME_BYTES if dialect_name == "kiss" else cobs_encoded_max(MAX_SERIAL_PAYLOAD)
    pieced = line.stream(side)
    out = []
    for piece in _chunks(data):
        out += pieced.feed(piece)
        if pieced.buffered > bound:
            raise AssertionError(f"{dialect_name} stream holds {pieced.buffered} bytes, over {bound}")
    whole = line.stream(side)
    at_once = whole.feed(data)
    if repr(out) != repr(at_once) or pieced.counters != whole.counters:
        raise AssertionError(
            f"{dialect_name} stream gives different records fed in pieces than at once: {out!r} vs {at_once!r}"
        )
    for item in out:
        if isinstance(item, LineError) and item.answer:
            error_answer(item)


def _side(data: bytes) -> str:
    """The end of the line that hears ``data`` (drawn from the input, so it replays)."""
    return "host" if zlib.adler32(data) & 1 else "modem"


def consume_line_ionotrail(data: bytes) -> None:
    """The ionotrail dialect's stream (COBS, records, CRC) at the host or the modem, fed in pieces."""
    _check_stream(_side(data), "ionotrail", data)


def consume_line_kiss(data: bytes) -> None:
    """The KISS dialect's stream at the host or the modem, fed in pieces."""
    _check_stream(_side(data), "kiss", data)


def consume_deframer(data: bytes) -> None:
    """The COBS deframer fed in pieces: bounded buffer, records within the limit,
    the same records and counters as fed at once; each record re-frames to itself."""
    from ionotrail.terminal.wire.serial_framing import Deframer, decode_record, encode_record

    pieced, whole = Deframer(), Deframer()
    out = []
    for piece in _chunks(data):
        out += pieced.feed(piece)
        if pieced.buffered > pieced.max_encoded:
            raise AssertionError(f"deframer holds {pieced.buffered} bytes, over {pieced.max_encoded}")
    if out != whole.feed(data) or pieced.counters != whole.counters:
        raise AssertionError("deframer gives different records fed in pieces than at once")
    for record in out:
        if len(record) > pieced.max_payload or decode_record(encode_record(record)[:-1]) != record:
            raise AssertionError(f"deframer delivered {record.hex()}, which does not frame back to itself")


# --- files a user gives: scenarios, traces, captures ----------------------------------------------

_scratch: dict[str, Path] = {}


def scratch_file(name: str, data: bytes) -> Path:
    """``data`` written to a file of this process's scratch directory (one per name, reused)."""
    if "dir" not in _scratch:
        _scratch["dir"] = Path(tempfile.mkdtemp(prefix="ionotrail-fuzz-"))
    path = _scratch["dir"] / name
    path.write_bytes(data)
    return path


def scenario_seeds() -> list[bytes]:
    from importlib import resources

    demo = resources.files("ionotrail.harness.demo").joinpath("link.toml").read_bytes()
    winter = b"""[scenario]
name = "Tarnvik Fell snow station to Kestrel Ridge (winter example)"
start = "2028-02-01T00:00:00Z"
duration_hours = 696.0
seed = 7
[terminal]
lat_deg = 68.90
tx_power_w = 100.0
[power]
policy = "adaptive"
burst_rate_prior = [30, 30, 30, 30, 30, 30, 30, 30, 30, 30, 30, 30, 30, 30, 30, 30, 30, 30, 30, 30, 30, 30, 30, 30]
[battery]
chemistry = "lifepo4"
capacity_wh = 60.0
[solar]
albedo = 0.8
"""
    return [demo, winter, b"[scenario]\nstart = 2027-01-15T00:00:00Z\nseed = 9223372036854775807\n", b""]


SCENARIO_TOKENS = (
    b"0", b"-0.0", b"1e400", b"-1e400", b"inf", b"-inf", b"nan", b"1e-400", b"0x7fffffffffffffff", b"9223372036854775808",
    b"1" * 30, b"1" * 400, b"1" * 5000, b"true", b'""', b'"' + b"x" * 81 + b'"', b"[]", b"{}", b"[[[[[[[[", b"[" * 3000,
    b"{a={a={a={a=1}}}}", b"1970-01-01T00:00:00Z", b"0001-01-01T00:00:00+23:59", b"9999-12-31T23:59:59-23:59",
    b"2106-02-07T06:28:15Z", b"2027-03-15", b"00:00:00", b'"2027-13-45T99:00:00Z"', b'"\\ud800"', b'"\\U0010ffff"',
    b"'''\n'''", b'"""', b"[scenario.x]", b"[[terminal]]", b"a.b.c = 1", b"\r\n", b"\x00", b"\xff\xfe",
)  # fmt: skip


def consume_scenario(data: bytes) -> None:
    """``scenario.load`` of a file holding ``data``: a scenario, or a ScenarioError naming the file."""
    from ionotrail.harness.channel.scenario import load

    path = scratch_file("scenario.toml", data)
    try:
        load(path)
    except ScenarioError as exc:
        if not str(exc).startswith(str(path)):
            raise AssertionError(f"scenario error does not name the file: {exc}") from None
        raise


def consume_scenario_override(data: bytes) -> None:
    """A ``--set section.key=value`` override of the demo scenario, as the command line passes it."""
    from ionotrail.harness.channel.scenario import load

    load(None, [data.decode("utf-8", errors="replace")])


def override_seeds() -> list[bytes]:
    return [
        b"link.bit_rate=9600",
        b"scenario.name=Tarnvik Fell",
        b"power.burst_rate_prior=[]",
        b"scenario.start=2027-01-15T00:00:00Z",
    ]


def trace_seeds() -> list[bytes]:
    from ionotrail.harness.reports.trace import TraceWriter

    frames = frame_seeds()
    out = io.StringIO()
    writer = TraceWriter(out, lambda: 0.0, 0.0)
    for k, frame in enumerate(frames):
        writer.frame("terminal" if k % 2 else "master", "in" if k % 3 else "out", frame, "ok", t=k * 0.1,
                     snr_db=math.nan if k % 4 == 0 else 10.0 + k, offset_hz=-3.5)  # fmt: skip
    text = out.getvalue().encode()
    lines = text.splitlines(keepends=True)
    return [text, b"".join(lines[:3]), lines[4] + b"\n\n" + lines[5]]


JSON_TOKENS = (
    b"null", b"true", b"1e400", b"-1e400", b"NaN", b"Infinity", b"-Infinity", b"1" * 400, b"1" * 5000, b'""',
    b'"zz"', b'"0"', b'"a b"', b"[]", b"{}", b"[" * 3000, b'{"hex": ', b'"\\ud800"', b'"\\u0000"', b"0.0", b"-0",
    b'"t"', b"{\"t\": 1}", b"\xff", b"\x00",
)  # fmt: skip


def consume_trace(data: bytes) -> None:
    """``read_trace`` over the lines of a file, each frame it yields decoded as ``decode --trace`` does."""
    from ionotrail.harness.reports.trace import outcome_of, read_trace
    from ionotrail.terminal.wire import decode

    text = data.decode("utf-8", errors="replace")
    for label, item in read_trace(iter(text.splitlines()), "fuzz.jsonl"):
        if not isinstance(label, str) or not isinstance(item, (bytes, str)):
            raise TypeError(f"read_trace gave {label!r}, {item!r}")
        if isinstance(item, bytes):
            try:
                decode(item)
            except DecodeError:
                pass
            outcome_of(item)


def _decode_command(option: str, data: bytes) -> None:
    """``ionotrail decode --json OPTION FILE`` on a file holding ``data``; refuses only with UserError."""
    import argparse

    from ionotrail.harness.cli import decode as command

    path = str(scratch_file("decode-input", data))
    args = argparse.Namespace(hex=[], file=None, cobs=False, demo=False, trace=None, json=True)
    if option == "--trace":
        args.trace = [path]
    else:
        args.file, args.cobs = [path], option == "--cobs"
    with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
        status = command.run(args)
    if status not in (0, 1):
        raise AssertionError(f"decode {option} exited {status}")


def consume_decode_trace(data: bytes) -> None:
    """``ionotrail decode --trace FILE``."""
    _decode_command("--trace", data)


def consume_decode_cobs(data: bytes) -> None:
    """``ionotrail decode --cobs --file FILE`` (a binary serial capture)."""
    _decode_command("--cobs", data)


def consume_decode_hex(data: bytes) -> None:
    """``ionotrail decode --file FILE`` (frames in hexadecimal, one a line)."""
    _decode_command("--file", data)


def _hex_seeds() -> list[bytes]:
    return [
        b"\n".join(f.hex().encode() for f in frame_seeds()) + b"\n",
        b"# a comment\n12 0a31:07\n\n" + frame_seeds()[0].hex().encode(),
    ]


def _cobs_capture_seeds() -> list[bytes]:
    return line_seeds("ionotrail")


# Interpreter workspace of one decode, as tests/test_decode_hostile.py declares
# it (DECODE_WORKSPACE); tests/test_fuzz.py checks the two agree.
DECODE_WORKSPACE = 64 * 1024

register(Target("wire", consume_wire, frame_seeds, (DecodeError,), _frame_mutate, weight=4.0, memory_bound=DECODE_WORKSPACE,
                doc="frames over the air: wire.decode, accepted frames re-encode to themselves"))  # fmt: skip
register(Target("fastpath", consume_fastpath, frame_seeds, (DecodeError,), _frame_mutate, weight=2.0, memory_bound=DECODE_WORKSPACE,
                doc="fragment, probe and ack fast decoders against the declarations"))  # fmt: skip
register(Target("link", consume_link, _stream_seeds, (), _stream_mutate, weight=0.8,
                doc="Link.on_frame over a stream of frames (timers fired, commands answered); never raises, bounded"))  # fmt: skip
register(Target("master", consume_master, _stream_seeds, (), _stream_mutate, weight=0.8,
                doc="MasterEndpoint.on_frame over a stream of frames (timers fired); never raises, bounded"))  # fmt: skip
register(Target("records", consume_records, record_seeds, (DecodeError,), _record_mutate, weight=2.0, memory_bound=DECODE_WORKSPACE,
                doc="host-modem record decoder; accepted records go round through the encoder"))  # fmt: skip
register(Target("deframer", consume_deframer, lambda: line_seeds("ionotrail"), (), mutate_bytes, tokens=(b"\x00", b"\x01", b"\xff" * 2, b"\x00\x00"),
                doc="COBS deframer fed in pieces: bounded, piece-independent"))  # fmt: skip
register(Target("line_ionotrail", consume_line_ionotrail, lambda: line_seeds("ionotrail"), (), mutate_bytes, weight=0.6, tokens=(b"\x00", b"\x01", b"\x11", b"\xff"),
                doc="ionotrail dialect stream at host and modem, fed in pieces"))  # fmt: skip
register(Target("line_kiss", consume_line_kiss, lambda: line_seeds("kiss"), (), mutate_bytes, tokens=(b"\xc0", b"\xdb", b"\xdb\xdc", b"\xdb\xdd", b"\xdb\xc0", b"\xc0\x00", b"\xc0\xff"),
                doc="KISS dialect stream at host and modem, fed in pieces"))  # fmt: skip
register(Target("scenario", consume_scenario, scenario_seeds, (ScenarioError,), mutate_text, tokens=SCENARIO_TOKENS, weight=0.3,
                doc="scenario.load of a TOML file: only ScenarioError, naming the file"))  # fmt: skip
register(Target("scenario_override", consume_scenario_override, override_seeds, (ScenarioError,), mutate_text, tokens=SCENARIO_TOKENS, weight=0.1,
                doc="a --set override of the demo scenario: only ScenarioError"))  # fmt: skip
register(Target("trace", consume_trace, trace_seeds, (), mutate_text, tokens=JSON_TOKENS, weight=0.5,
                doc="read_trace over a JSON-lines trace, frames decoded"))  # fmt: skip
register(Target("decode_trace", consume_decode_trace, trace_seeds, (UserError,), mutate_text, tokens=JSON_TOKENS, weight=0.15,
                doc="ionotrail decode --trace: only UserError"))  # fmt: skip
register(Target("decode_cobs", consume_decode_cobs, _cobs_capture_seeds, (UserError,), mutate_bytes, tokens=(b"\x00", b"\x01"), weight=0.15,
                doc="ionotrail decode --cobs --file: only UserError"))  # fmt: skip
register(Target("decode_hex", consume_decode_hex, _hex_seeds, (UserError,), mutate_text, tokens=(b"#", b":", b" ", b"0", b"zz", b"\xff"), weight=0.15,
                doc="ionotrail decode --file (hex lines): only UserError"))  # fmt: skip

# --- key files and stored records ---------------------------------------------------------------


def key_file_seeds() -> list[bytes]:
    from ionotrail.harness.runners.keying import simulated_site
    from ionotrail.terminal.auth.keyfile import encode_key_file

    site = simulated_site(7)
    return [encode_key_file(site), encode_key_file(site.root(TERMINAL)), encode_key_file(site.root(OTHER_TERMINAL, 3))]


def consume_key_file(data: bytes) -> None:
    """``decode_key_file``: only its DecodeError; a key it accepts encodes back to the same bytes."""
    from ionotrail.terminal.auth.keyfile import decode_key_file, encode_key_file

    key = decode_key_file(data)
    if encode_key_file(key) != data:
        raise AssertionError("an accepted key file does not encode back to itself")
    if key.material.hex() in repr(key):
        raise AssertionError("a key's repr shows the key")


def consume_key_file_load(data: bytes) -> None:
    """``ionotrail serve/master --keys FILE``'s loader on a file readable by its owner only: only UserError."""
    from ionotrail.harness.cli.keys import load_key_file

    path = scratch_file("fuzz.key", data)
    path.chmod(0o600)
    load_key_file(path)


def pack_records(records: dict[str, bytes]) -> bytes:
    """Store records as one input: per record, key length (1 byte), key, value length (2 bytes), value."""
    out = bytearray()
    for key, value in sorted(records.items()):
        raw = key.encode("ascii")
        out += bytes([len(raw)]) + raw + len(value).to_bytes(2, "big") + value
    return bytes(out)


def unpack_records(data: bytes) -> dict[str, bytes]:
    records: dict[str, bytes] = {}
    pos = 0
    while pos < len(data):
        size = data[pos]
        key = data[pos + 1 : pos + 1 + size].decode("ascii", "replace")
        pos += 1 + size
        length = int.from_bytes(data[pos : pos + 2], "big")
        records[key] = data[pos + 2 : pos + 2 + length]
        pos += 2 + length
    return records


def store_record_seeds() -> list[bytes]:
    """What a terminal's and a master's stores hold after some traffic, commands and a rotation."""
    from ionotrail.harness.runners.keying import simulated_site
    from ionotrail.terminal.auth.authenticator import MasterAuthenticator, TerminalAuthenticator
    from ionotrail.terminal.delivery.reassembly import Reassembler
    from ionotrail.terminal.delivery.sender import Priority, Sender
    from ionotrail.terminal.limits import DEFAULT_LIMITS, FORMAT_VERSION
    from ionotrail.terminal.link.commands import CommandMemory
    from ionotrail.terminal.outbox.journal import MasterJournal
    from ionotrail.terminal.outbox.outbox import Outbox
    from ionotrail.terminal.stores.memory import MemoryStore
    from ionotrail.terminal.wire import AckBlock, Reply, ReplyStatus, encode

    site = simulated_site(7)
    terminal_store, master_store = MemoryStore(), MemoryStore()
    sender = Sender(TERMINAL, MASTER)
    outbox = Outbox(sender)
    outbox.restore({}, 0.0)
    reassembler = Reassembler()
    journal = MasterJournal(reassembler)
    for k in range(3):
        batch = outbox.accept(bytes([k]) * (100 + 300 * k), Priority.ALARM if k == 1 else Priority.ROUTINE, 0.0)
        terminal_store.commit(batch)
        outbox.committed(batch)
    for fragment in sender.fill(700, 1.0):
        reception = reassembler.receive(fragment, 1.0)
        sender.on_ack(reception.ack, 1.1)
        master_store.commit(journal.changes([reception.delivery] if reception.delivery else []))
    sender.on_ack(AckBlock(TERMINAL, 2, ((0, 40), (80, 120))), 1.2)
    changes = outbox.changes()
    terminal_store.commit(changes)
    outbox.committed(changes)
    terminal_auth, master_auth = TerminalAuthenticator(site.root(TERMINAL)), MasterAuthenticator(site)
    memory = CommandMemory(DEFAULT_LIMITS)
    for command_id in (1, 2):
        sig = master_auth.sign_command(TERMINAL, frame_version=FORMAT_VERSION, master=MASTER, command_id=command_id, opcode=1, arguments=b"")
        terminal_auth.receive_command(frame_version=FORMAT_VERSION, master=MASTER, command_id=command_id, opcode=1, arguments=b"",
                                      epoch=sig.epoch, counter=sig.counter, tag=sig.tag)  # fmt: skip
        memory.arrived(command_id)
    memory.answered(1, encode(Reply(TERMINAL, MASTER, 1, ReplyStatus.OK, b"done", 0, 1, bytes(8))))
    opcode, arguments = master_auth.begin_rotation(TERMINAL)
    sig = master_auth.sign_command(TERMINAL, frame_version=FORMAT_VERSION, master=MASTER, command_id=3, opcode=opcode, arguments=arguments)
    terminal_auth.receive_command(frame_version=FORMAT_VERSION, master=MASTER, command_id=3, opcode=opcode, arguments=arguments,
                                  epoch=sig.epoch, counter=sig.counter, tag=sig.tag)  # fmt: skip
    terminal = terminal_store.load() | terminal_auth.records() | dict(memory.batch().puts)
    master = master_store.load() | master_auth.records()
    return [pack_records(terminal), pack_records(master), pack_records(terminal | master)]


def consume_store_records(data: bytes) -> None:
    """Records a store gives back at boot, taken up by every part that keeps some: only DecodeError."""
    from ionotrail.harness.runners.keying import simulated_site
    from ionotrail.terminal.auth.authenticator import ROOT_KEY, MasterAuthenticator, TerminalAuthenticator
    from ionotrail.terminal.delivery.reassembly import Reassembler
    from ionotrail.terminal.delivery.sender import Sender
    from ionotrail.terminal.limits import DEFAULT_LIMITS
    from ionotrail.terminal.link.commands import CommandMemory
    from ionotrail.terminal.outbox.journal import MasterJournal
    from ionotrail.terminal.outbox.outbox import Outbox

    records = unpack_records(data)
    failures: list[DecodeError] = []
    parts: list[Callable[[], object]] = [
        lambda: Outbox(Sender(TERMINAL, MASTER)).restore(records, 0.0),
        lambda: MasterJournal(Reassembler()).restore(records, 0.0),
        lambda: MasterAuthenticator.restore(simulated_site(7), records),
        lambda: CommandMemory(DEFAULT_LIMITS).restore(records),
    ]
    if ROOT_KEY in records:
        parts.append(lambda: TerminalAuthenticator.restore(records))
    for part in parts:
        try:
            part()
        except DecodeError as exc:
            failures.append(exc)
    if failures:
        raise failures[0]


register(Target("keyfile", consume_key_file, key_file_seeds, (DecodeError,), mutate_bytes, weight=0.5, memory_bound=DECODE_WORKSPACE,
                doc="decode_key_file: only its DecodeError; accepted keys encode back to themselves, reprs hide keys"))  # fmt: skip
register(Target("keyfile_load", consume_key_file_load, key_file_seeds, (UserError,), mutate_bytes, weight=0.1,
                doc="the --keys loader on an owner-only file: only UserError"))  # fmt: skip
register(Target("store_records", consume_store_records, store_record_seeds, (DecodeError,), mutate_bytes, weight=0.4,
                doc="stored records taken up at boot (outbox, journal, key state, command memory): only DecodeError"))  # fmt: skip

# --- running ----------------------------------------------------------------------------------

CORPUS_DIR = Path(__file__).resolve().parents[2] / "tests" / "corpus"
"""Where failing inputs are kept: ``tests/corpus/<target>/<sha256 prefix>``."""

MAX_SAVED_PER_SIGNATURE = 1


def corpus_name(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()[:16]


def save_failure(target: str, data: bytes, corpus: Path | None = None) -> Path:
    """Keep a failing input in the corpus, named by its content hash."""
    folder = (corpus or CORPUS_DIR) / target
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / corpus_name(data)
    path.write_bytes(data)
    return path


def outcome(target: Target, data: bytes) -> tuple[str, BaseException | None]:
    """("ok" or the exception class, the exception when it is a failure)."""
    try:
        target.consume(data)
    except target.allowed as exc:
        return type(exc).__name__, None
    except Exception as exc:  # noqa: BLE001 (anything else escaping is what the harness looks for)
        return "FAIL " + type(exc).__name__, exc
    return "ok", None


def _signature(exc: BaseException) -> str:
    frames = traceback.extract_tb(exc.__traceback__)
    where = f"{Path(frames[-1].filename).name}:{frames[-1].lineno}" if frames else "?"
    return f"{type(exc).__name__} at {where}"


def minimize(target: Target, data: bytes, signature: str, budget: int = 1000) -> bytes:
    """A shorter input failing the same way (same exception class, raised at the
    same place): spans cut out, halving their length, while the failure stays.
    Inputs that exhaust the recursion limit are kept whole: cut to the edge,
    they would pass or fail with the depth of the caller's stack."""
    if signature.startswith("RecursionError"):
        return data
    tries = 0
    span = max(1, len(data) // 2)
    while span >= 1 and tries < budget:
        start = 0
        while start < len(data) and tries < budget:
            candidate = data[:start] + data[start + span :]
            tries += 1
            _, exc = outcome(target, candidate)
            if exc is not None and _signature(exc) == signature:
                data = candidate
            else:
                start += span
        span //= 2
    return data


def run(target: Target | str, seed: int, count: int, *, corpus: Path | None = None, save: bool = True,
        memory_every: int = 0) -> dict[str, Any]:  # fmt: skip
    """Feed ``target`` ``count`` inputs generated from ``seed``.

    Returns {"target", "seed", "inputs", "outcomes": {class name: count},
    "failures": {signature: {"count", "saved", "message"}}, "peak_bytes"}.
    Each distinct failure (exception class and where it was raised) saves its
    first input to the corpus (``corpus`` or tests/corpus) unless ``save`` is
    False.  With ``memory_every`` > 0, every that-many-th input is run under
    tracemalloc and the largest peak is reported."""
    target = TARGETS[target] if isinstance(target, str) else target
    outcomes: dict[str, int] = {}
    failures: dict[str, dict[str, Any]] = {}
    peak = 0
    for k, data in enumerate(target.generate(seed, count)):
        if memory_every and k % memory_every == 0:
            tracemalloc.start()
            tracemalloc.reset_peak()
            name, exc = outcome(target, data)
            peak = max(peak, tracemalloc.get_traced_memory()[1])
            tracemalloc.stop()
        else:
            name, exc = outcome(target, data)
        outcomes[name] = outcomes.get(name, 0) + 1
        if exc is not None:
            signature = _signature(exc)
            failure = failures.setdefault(signature, {"count": 0, "saved": [], "message": str(exc)[:300]})
            failure["count"] += 1
            if save and len(failure["saved"]) < MAX_SAVED_PER_SIGNATURE:
                kept = minimize(target, data, signature)
                failure["saved"].append(str(save_failure(target.name, kept, corpus)))
    return {
        "target": target.name,
        "seed": seed,
        "inputs": count,
        "outcomes": outcomes,
        "failures": failures,
        "peak_bytes": peak,
    }


def _job(args: tuple[str, int, int, str | None, bool, int]) -> dict[str, Any]:
    name, seed, count, corpus, save, memory_every = args
    started = time.perf_counter()
    result = run(name, seed, count, corpus=Path(corpus) if corpus else None, save=save, memory_every=memory_every)
    result["seconds"] = time.perf_counter() - started
    return result


def shares(total: int, names: Sequence[str]) -> dict[str, int]:
    """``total`` inputs split over ``names`` by their weights (every target gets at least one)."""
    weights = {name: TARGETS[name].weight for name in names}
    whole = sum(weights.values())
    counts = {name: max(1, int(total * w / whole)) for name, w in weights.items()}
    counts[names[0]] += max(0, total - sum(counts.values()))
    return counts


def run_many(total: int, *, names: Sequence[str] | None = None, workers: int = 2, seed: int = 0, jobs_per_target: int | None = None,
             corpus: Path | None = None, save: bool = True, memory_every: int = 0) -> dict[str, Any]:  # fmt: skip
    """``total`` inputs across ``names`` (all targets by default) in ``workers`` processes.

    Each target's share is cut into jobs with seeds fixed by the job's index,
    so the inputs and the merged counts do not depend on which worker ran what."""
    names = list(names or TARGETS)
    jobs_per_target = jobs_per_target or 4 * workers
    jobs = []
    for name, count in shares(total, names).items():
        cut = [count // jobs_per_target + (1 if k < count % jobs_per_target else 0) for k in range(jobs_per_target)]
        jobs += [
            (name, seed * 1_000_003 + k, n, str(corpus) if corpus else None, save, memory_every)
            for k, n in enumerate(cut)
            if n
        ]
    started = time.perf_counter()
    if workers > 1:
        with concurrent.futures.ProcessPoolExecutor(workers) as pool:
            results = list(pool.map(_job, jobs))
    else:
        results = [_job(job) for job in jobs]
    elapsed = time.perf_counter() - started
    merged: dict[str, dict[str, Any]] = {}
    for result in results:
        into = merged.setdefault(
            result["target"], {"inputs": 0, "outcomes": {}, "failures": {}, "peak_bytes": 0, "cpu_seconds": 0.0}
        )
        into["inputs"] += result["inputs"]
        into["peak_bytes"] = max(into["peak_bytes"], result["peak_bytes"])
        into["cpu_seconds"] += result["seconds"]
        for key, n in result["outcomes"].items():
            into["outcomes"][key] = into["outcomes"].get(key, 0) + n
        for signature, failure in result["failures"].items():
            kept = into["failures"].setdefault(signature, {"count": 0, "saved": [], "message": failure["message"]})
            kept["count"] += failure["count"]
            kept["saved"] += failure["saved"]
    for into in merged.values():
        into["cpu_seconds"] = round(into["cpu_seconds"], 2)
        into["outcomes"] = dict(sorted(into["outcomes"].items()))
    inputs = sum(r["inputs"] for r in results)
    return {
        "inputs": inputs,
        "workers": workers,
        "seed": seed,
        "elapsed_s": round(elapsed, 2),
        "rate_per_s": round(inputs / elapsed, 1) if elapsed else None,
        "failures": sum(f["count"] for m in merged.values() for f in m["failures"].values()),
        "targets": merged,
    }


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        prog="python -m ionotrail.harness.testing.fuzz", description=__doc__.split("\n\n")[0]
    )
    parser.add_argument("--count", type=int, default=100_000, help="inputs in all (split over the targets by weight)")
    parser.add_argument("--workers", type=int, default=min(2, os.cpu_count() or 1))
    parser.add_argument("--target", action="append", choices=sorted(TARGETS), help="only this target (repeatable)")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument(
        "--corpus", type=Path, default=None, help=f"where failing inputs are saved (default {CORPUS_DIR})"
    )
    parser.add_argument("--no-save", action="store_true", help="do not save failing inputs")
    parser.add_argument("--memory-every", type=int, default=0, help="sample tracemalloc peaks every N inputs")
    args = parser.parse_args(argv)
    result = run_many(args.count, names=args.target, workers=args.workers, seed=args.seed, corpus=args.corpus,
                      save=not args.no_save, memory_every=args.memory_every)  # fmt: skip
    json.dump(result, sys.stdout)
    sys.stdout.write("\n")
    return 1 if result["failures"] else 0


if __name__ == "__main__":
    raise SystemExit(main())
