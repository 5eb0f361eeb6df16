"""The demo gauge and the report format its messages use."""

from __future__ import annotations

import itertools
import random
import struct

from hypothesis import given
from hypothesis import strategies as st
from ionotrail.harness.demo.gauge import (
    REPORT,
    REPORT_INTERVAL_S,
    SET_INTERVAL,
    Backlog,
    DemoGauge,
    ReportKind,
    decode_report,
    encode_report,
    report_created,
)
from ionotrail.terminal.delivery.sender import Priority
from ionotrail.terminal.errors import DecodeError
from ionotrail.terminal.wire import ReplyStatus


def run(gauge: DemoGauge, seconds: float) -> list[tuple[float, bytes, Priority]]:
    out = []
    while (due := gauge.next_due()) is not None and due <= seconds:
        out += [(due, payload, priority) for payload, priority in gauge.take(due, room=99)]
    return out


def test_reports_every_fifteen_minutes_of_40_to_120_bytes() -> None:
    messages = run(DemoGauge(random.Random(1)), 10 * 86400)
    routine = [(t, p) for t, p, prio in messages if prio is Priority.ROUTINE]
    assert len(routine) == 960
    gaps = {round(b[0] - a[0], 6) for a, b in itertools.pairwise(routine)}
    assert gaps == {REPORT_INTERVAL_S}
    assert all(40 <= len(p) <= 120 for _, p in routine)
    assert len({len(p) for _, p in routine}) > 30  # sizes vary over the whole range


def test_alarms_are_rare_and_marked_as_alarms() -> None:
    messages = run(DemoGauge(random.Random(2)), 100 * 86400)
    alarms = [p for _, p, prio in messages if prio is Priority.ALARM]
    # Poisson with mean 2 a day: 200 in 100 days, a 4.5-sigma band either side.
    assert 136 <= len(alarms) <= 264
    assert all(decode_report(p)["kind"] == "alarm" for p in alarms)


def test_same_seed_same_messages() -> None:
    assert run(DemoGauge(random.Random(5)), 86400) == run(DemoGauge(random.Random(5)), 86400)
    assert run(DemoGauge(random.Random(5)), 86400) != run(DemoGauge(random.Random(6)), 86400)


@given(
    kind=st.sampled_from(ReportKind),
    sequence=st.integers(0, 0xFFFF),
    created=st.floats(0, 2**32 - 1, allow_nan=False),
    readings=st.lists(st.integers(-(2**15), 2**15 - 1), max_size=60),
)
def test_report_encoder_is_byte_identical_to_the_declaration(kind: ReportKind, sequence: int, created: float, readings: list[int]) -> None:
    whole = int(created)
    declared = REPORT.build(
        {"kind": kind, "sequence": sequence, "created_s": whole, "created_ms": min(999, int((created - whole) * 1000)), "readings": readings}
    )
    assert encode_report(kind, sequence, created, readings) == declared
    parsed = decode_report(declared)
    assert parsed["readings"] == list(REPORT.parse(declared).readings) == readings
    assert report_created(declared) == whole + min(999, int((created - whole) * 1000)) / 1000


def test_payloads_that_are_not_reports() -> None:
    for payload in (b"", b"\x01" * 8, b"\x07" + bytes(10), b"\x01" + bytes(9)):
        assert report_created(payload) is None
    try:
        decode_report(b"hello")
    except DecodeError as exc:
        assert "not a demo report" in str(exc)
    else:
        raise AssertionError("decode_report accepted a non-report")
    assert struct.calcsize("!BHIH") == 9  # the header the docs table shows


def test_set_interval_command() -> None:
    gauge = DemoGauge(random.Random(1))
    assert gauge.command(SET_INTERVAL, (600).to_bytes(4, "big")) == (ReplyStatus.OK, (600).to_bytes(4, "big"))
    assert gauge.interval_s == 600
    assert gauge.command(SET_INTERVAL, b"\x00")[0] is ReplyStatus.BAD_ARGUMENTS
    assert gauge.command(SET_INTERVAL, (5).to_bytes(4, "big"))[0] is ReplyStatus.BAD_ARGUMENTS
    assert gauge.command(99, b"")[0] is ReplyStatus.UNKNOWN_OPCODE


def test_backlog_fills_exactly_the_room() -> None:
    backlog = Backlog(1001)
    batch = backlog.take(0.0, room=5)
    assert len(batch) == 5 and all(len(p) == 1001 for p, _ in batch)
    assert backlog.take(5.0, room=0) == [] and backlog.next_due() == 35.0
