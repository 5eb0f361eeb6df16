"""Hypothesis strategies for frames and hostile bytes, shared by the test suite
and by anyone's property tests of their own implementation."""

from __future__ import annotations

import random

from hypothesis import strategies as st
from ionotrail.harness.testing.faults import FaultSchedule
from ionotrail.terminal.delivery.sender import Priority
from ionotrail.terminal.limits import (
    AUTH_TAG_BYTES,
    DEFAULT_LIMITS,
    MAX_ACK_RANGES,
    MAX_COMMAND_BYTES,
    MAX_FRAGMENT_PAYLOAD,
    MAX_MESSAGE_STREAM,
)
from ionotrail.terminal.wire import Ack, AckBlock, Command, CommandBlock, Fragment, Probe, Reply, ReplyStatus

u8 = st.integers(0, 0xFF)
u16 = st.integers(0, 0xFFFF)
u32 = st.integers(0, 0xFFFFFFFF)


@st.composite
def byte_ranges(draw: st.DrawFn, max_count: int = MAX_ACK_RANGES) -> tuple[tuple[int, int], ...]:
    """Ascending, disjoint, non-adjacent ranges inside the message space."""
    count = draw(st.integers(0, max_count))
    cuts = sorted(draw(st.sets(st.integers(0, MAX_MESSAGE_STREAM), min_size=2 * count, max_size=2 * count)))
    ranges = [(cuts[i], cuts[i + 1]) for i in range(0, len(cuts), 2)]
    # make neighbours non-adjacent by dropping any range that touches the previous one
    kept: list[tuple[int, int]] = []
    for start, end in ranges:
        if kept and start <= kept[-1][1]:
            continue
        kept.append((start, end))
    return tuple(kept)


@st.composite
def ack_blocks(draw: st.DrawFn) -> AckBlock:
    outcome = draw(st.sampled_from(["partial", "complete", "refused"]))
    ranges = draw(byte_ranges()) if outcome == "partial" else ()
    return AckBlock(draw(u16), draw(u16), ranges, outcome == "complete", draw(st.booleans()), outcome == "refused")


tags = st.binary(min_size=AUTH_TAG_BYTES, max_size=AUTH_TAG_BYTES)
command_blocks = st.builds(CommandBlock, u8, u8, st.binary(max_size=MAX_COMMAND_BYTES), u16, u32, tags)


@st.composite
def probes(draw: st.DrawFn) -> Probe:
    poll = draw(st.none() | u16)
    command = draw(st.none() | command_blocks) if poll is not None else None
    return Probe(draw(u8), draw(u16), poll, draw(st.none() | ack_blocks()), command)


@st.composite
def fragments(draw: st.DrawFn) -> Fragment:
    payload = draw(st.binary(min_size=1, max_size=MAX_FRAGMENT_PAYLOAD))
    offset = draw(st.integers(0, MAX_MESSAGE_STREAM - len(payload)))
    return Fragment(
        draw(u16), draw(u8), draw(u16), offset, payload, draw(st.booleans()), draw(st.booleans()), draw(st.booleans())
    )


acks = st.builds(Ack, u8, ack_blocks())
commands = st.builds(Command, u8, u16, command_blocks)
replies = st.builds(Reply, u16, u8, u8, st.sampled_from(ReplyStatus), st.binary(max_size=MAX_COMMAND_BYTES), u16, u32, tags)

frames = st.one_of(probes(), fragments(), acks, commands, replies)
"""Any valid frame representation."""


# --- workloads and channel fault schedules ------------------------------------------

@st.composite
def message_payloads(draw: st.DrawFn, max_size: int = DEFAULT_LIMITS.max_message_payload) -> bytes:
    """Mostly sensor-report sizes, sometimes the extremes: 1 byte and the maximum."""
    size = draw(st.one_of(st.integers(1, 120), st.integers(121, max_size), st.sampled_from([1, max_size])))
    if size <= 256:
        return draw(st.binary(min_size=size, max_size=size))
    return random.Random(draw(st.integers(0, 2**32))).randbytes(size)  # large: seeded filler


@st.composite
def workloads(draw: st.DrawFn, max_messages: int = 12) -> list[tuple[bytes, Priority, float]]:
    """(payload, priority, arrival time in seconds) per message, by arrival."""
    count = draw(st.integers(1, max_messages))
    times = sorted(draw(st.lists(st.floats(0, 24 * 3600, allow_nan=False), min_size=count, max_size=count)))
    return [(draw(message_payloads()), draw(st.sampled_from(Priority)), t) for t in times]


@st.composite
def fault_schedules(draw: st.DrawFn) -> FaultSchedule:
    """A channel's misbehaviour: independent and bursty loss, duplication,
    reordering, corruption caught by the CRC, truncation, opening budgets."""
    budgets = draw(st.lists(st.integers(5, 400), min_size=1, max_size=8))
    return FaultSchedule(
        loss=draw(st.floats(0, 0.5)),
        burst_enter=draw(st.floats(0, 0.3)),
        burst_leave=draw(st.floats(0.05, 1)),
        burst_loss=draw(st.floats(0.5, 1)),
        duplicate=draw(st.floats(0, 0.3)),
        reorder=draw(st.floats(0, 0.5)),
        corrupt=draw(st.floats(0, 0.2)),
        truncate=draw(st.floats(0, 0.1)),
        budgets=tuple(budgets),
    )
