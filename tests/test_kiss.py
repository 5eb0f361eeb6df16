"""The KISS dialect against the KISS escape rules.

Values from memory of the KISS TNC protocol note (Chepponis and Karn, 1987),
not read here: FEND 0xC0 ends a frame, FESC 0xDB escapes, TFEND 0xDC and TFESC
0xDD follow FESC; a data 0xC0 is sent as DB DC and a data 0xDB as DB DD; the
first byte of a frame is port (high nibble) and command (low nibble), command
0 a data frame, 1-6 settings (TXDELAY, P, SLOTTIME, TXTAIL, FULLDUPLEX,
SETHARDWARE) and 0xFF the return from KISS mode.  The note calls FESC followed
by anything else an error; dropping that frame is our choice (it cannot be
trusted), as is dropping a frame longer than one air frame.
"""

from __future__ import annotations

import math
from typing import Any

import pytest
from hypothesis import given
from hypothesis import strategies as st
from ionotrail.terminal.errors import UsageError
from ionotrail.terminal.limits import MAX_KISS_FRAME_BYTES, MAX_RECORD_FRAME_BYTES
from ionotrail.terminal.modem.dialects import (
    FEND,
    FESC,
    TFEND,
    TFESC,
    KissDialect,
    LineError,
    Side,
    dialect,
    kiss_escape,
)
from ionotrail.terminal.modem.records import PaState, ProbeStop, Received, RecordType, Status, Transmit

KISS = dialect("kiss")


def test_the_special_bytes() -> None:
    assert (FEND, FESC, TFEND, TFESC) == (0xC0, 0xDB, 0xDC, 0xDD)


ESCAPES = [
    (b"\x01\x02", b"\x01\x02"),
    (b"\xc0", b"\xdb\xdc"),
    (b"\xdb", b"\xdb\xdd"),
    (b"\xdb\xdc", b"\xdb\xdd\xdc"),  # a data TFEND after a data FESC stays as it is
    (b"\xc0\xdb\xc0", b"\xdb\xdc\xdb\xdd\xdb\xdc"),
    (b"\xdc\xdd", b"\xdc\xdd"),  # TFEND and TFESC alone are data
]


@pytest.mark.parametrize(("data", "escaped"), ESCAPES)
def test_escape_examples(data: bytes, escaped: bytes) -> None:
    assert kiss_escape(data) == escaped
    assert KISS.encode(Transmit(9, data)) == b"\xc0\x00" + escaped + b"\xc0"
    decoded = KISS.stream(Side.MODEM).feed(b"\xc0\x00" + escaped + b"\xc0")
    assert decoded == [Transmit(0, data)]  # KISS carries no host id


def test_received_frames_come_without_measurements() -> None:
    line = KISS.encode(Received(12.0, 9.5, -40.0, b"\x12\xc0"))
    assert line == b"\xc0\x00\x12\xdb\xdc\xc0"
    [record] = KISS.stream(Side.HOST).feed(line)
    assert isinstance(record, Received) and record.frame == b"\x12\xc0"
    assert all(math.isnan(v) for v in (record.modem_time_s, record.snr_db, record.offset_hz))


def test_kiss_carries_only_frames() -> None:
    assert {t for t in RecordType if KISS.carries(t)} == {RecordType.TRANSMIT, RecordType.RECEIVED}
    for record in (ProbeStop(), Status(0.0, 20.0, 12.0, PaState.ON, 0.0)):
        with pytest.raises(UsageError, match="KISS carries only"):
            KISS.encode(record)


FRAMES = [Transmit(0, b"\x11\xc0\xdb\x00"), Transmit(0, bytes(range(256))[:MAX_RECORD_FRAME_BYTES]), Transmit(0, b"\xdd")]


def test_three_ways() -> None:
    line = b"".join(KISS.encode(f) for f in FRAMES)
    assert KISS.stream(Side.MODEM).feed(line) == FRAMES
    stream = KISS.stream(Side.MODEM)
    assert [r for i in range(len(line)) for r in stream.feed(line[i : i + 1])] == FRAMES
    stream = KISS.stream(Side.MODEM)
    assert stream.feed(line + b"\x00\x01\x02") == FRAMES  # the trailing frame waits for its FEND
    assert stream.buffered == 3 and stream.counters["records"] == len(FRAMES)


def test_back_to_back_fends_are_ignored() -> None:
    stream = KISS.stream(Side.MODEM)
    assert stream.feed(b"\xc0\xc0\xc0\x00\x41\xc0\xc0\xc0\xc0\x00\x42\xc0") == [Transmit(0, b"A"), Transmit(0, b"B")]
    assert stream.counters["records"] == 2
    assert sum(v for k, v in stream.counters.items() if k != "records") == 0


@pytest.mark.parametrize("bad", [0x00, 0x41, FESC, 0xFF])
def test_a_bad_escape_drops_the_frame(bad: int) -> None:
    stream = KISS.stream(Side.MODEM)
    line = b"\xc0\x00\x41\xdb" + bytes((bad,)) + b"\x42\xc0" + KISS.encode(Transmit(0, b"ok"))
    assert stream.feed(line) == [LineError("bad_line_code", 0, False), Transmit(0, b"ok")]
    assert stream.counters["bad_line_code"] == 1


def test_an_escape_cut_by_fend_drops_the_frame() -> None:
    stream = KISS.stream(Side.MODEM)
    assert stream.feed(b"\xc0\x00\x41\xdb\xc0\x00\x42\xc0") == [LineError("bad_line_code", 0, False), Transmit(0, b"B")]


def test_an_overlong_frame_is_dropped_with_a_bounded_buffer() -> None:
    stream = KISS.stream(Side.MODEM)
    out = []
    for _ in range(10):  # ten times the largest frame, fed in pieces
        out += stream.feed(b"\x00" + b"\x55" * MAX_KISS_FRAME_BYTES)
        assert stream.buffered <= MAX_KISS_FRAME_BYTES
    out += stream.feed(b"\xc0" + KISS.encode(Transmit(0, b"after")))
    assert out == [LineError("overrun", 0, False), Transmit(0, b"after")]
    assert stream.counters["overrun"] == 1


def test_the_largest_frame_fits() -> None:
    biggest = Transmit(0, b"\xc0" * MAX_RECORD_FRAME_BYTES)  # every byte escaped
    assert KISS.stream(Side.MODEM).feed(KISS.encode(biggest)) == [biggest]


@pytest.mark.parametrize("command", [0x01, 0x02, 0x03, 0x04, 0x05, 0x06, 0xFF])
def test_other_commands_decode_to_nothing_and_are_counted(command: int) -> None:
    stream = KISS.stream(Side.HOST)
    assert stream.feed(bytes((FEND, command, 0x28, FEND))) == []
    assert stream.counters["kiss_commands"] == 1 and stream.counters["records"] == 0


def test_other_ports_are_counted_and_the_port_is_configurable() -> None:
    stream = KISS.stream(Side.HOST)
    assert stream.feed(b"\xc0\x10\x41\xc0") == []
    assert stream.counters["other_port"] == 1
    port1 = KissDialect(port=1)
    assert port1.encode(Transmit(0, b"A")) == b"\xc0\x10\x41\xc0"
    assert port1.stream(Side.MODEM).feed(b"\xc0\x10\x41\xc0") == [Transmit(0, b"A")]
    with pytest.raises(UsageError):
        KissDialect(port=16)


def test_an_empty_data_frame_is_malformed() -> None:
    stream = KISS.stream(Side.HOST)
    assert stream.feed(b"\xc0\x00\xc0") == [LineError("malformed", int(RecordType.RECEIVED), False)]


@pytest.mark.property
@given(st.lists(st.binary(min_size=1, max_size=MAX_RECORD_FRAME_BYTES), max_size=6), st.data())
def test_any_frames_in_any_pieces(frames: list[bytes], data: Any) -> None:
    line = b"".join(KISS.encode(Received(0.0, 0.0, 0.0, f)) for f in frames)
    stream = KISS.stream(Side.HOST)
    cuts = sorted(data.draw(st.lists(st.integers(0, len(line)), max_size=8)))
    out: list[Any] = []
    for start, end in zip([0, *cuts], [*cuts, len(line)], strict=True):
        out += stream.feed(line[start:end])
    assert [r.frame for r in out] == frames
