"""Host-modem records (docs/modem.md) and the ionotrail dialect that carries them.

Check values: CRC-16/IBM-3740 is cross-checked with ``binascii.crc_hqx(data,
0xFFFF)`` (the same polynomial and initial value, from the standard library);
COBS examples are in tests/test_serial_framing.py.  Readers are tested whole,
byte at a time and with trailing bytes (the h11 habit, docs/guide style).
"""

from __future__ import annotations

import binascii
import json
import math
import random
from pathlib import Path
from typing import Any

import pytest
from hypothesis import given
from hypothesis import strategies as st
from ionotrail.terminal.errors import DecodeError, Reason, UsageError
from ionotrail.terminal.limits import (
    MAX_MODEM_TIME_US,
    MAX_RECORD_FRAME_BYTES,
    MAX_RECORD_METADATA_BYTES,
    MAX_SERIAL_PAYLOAD,
    cobs_encoded_max,
)
from ionotrail.terminal.modem import records
from ionotrail.terminal.modem.dialects import (
    DIALECTS,
    LINE_ERROR_REASONS,
    LineError,
    Side,
    dialect,
    error_answer,
)
from ionotrail.terminal.modem.records import (
    HOST_TO_MODEM,
    MODEM_TO_HOST,
    Configure,
    ErrorAnswer,
    ErrorCode,
    Listen,
    PaState,
    ProbeStart,
    ProbeStop,
    Received,
    RecordType,
    Reset,
    ResetReason,
    Status,
    StatusQuery,
    Transmit,
    Transmitted,
    decode_record_body,
    encode_record_body,
)
from ionotrail.terminal.wire.serial_framing import encode_record

# --- strategies: every record type, over its whole wire range ---------------------------

frames = st.binary(min_size=1, max_size=MAX_RECORD_FRAME_BYTES)
u16 = st.integers(0, 0xFFFF)
u32 = st.integers(0, 0xFFFF_FFFF)


def steps(scale: int, low: int, high: int, unknown: bool = False) -> st.SearchStrategy[float]:
    values = st.integers(low, high).map(lambda n: n / scale)
    return values | st.just(math.nan) if unknown else values


modem_times = steps(1_000_000, 0, MAX_MODEM_TIME_US)

RECORDS: dict[RecordType, st.SearchStrategy[Any]] = {
    RecordType.TRANSMIT: st.builds(Transmit, u16, frames),
    RecordType.PROBE_START: st.builds(ProbeStart, steps(1000, 1, 0xFFFF), frames),
    RecordType.PROBE_STOP: st.builds(ProbeStop),
    RecordType.LISTEN: st.builds(Listen, st.booleans()),
    RecordType.CONFIGURE: st.builds(Configure, u32, u32, st.integers(1, 0xFFFF_FFFF), steps(10, 0, 0xFFFF)),
    RecordType.STATUS_QUERY: st.builds(StatusQuery),
    RecordType.TRANSMITTED: st.builds(Transmitted, u16, st.booleans(), steps(1_000_000, 0, 0xFFFF_FFFF)),
    RecordType.RECEIVED: st.builds(
        Received, modem_times, steps(100, -32767, 32767, True), steps(10, -(2**31) + 1, 2**31 - 1, True), frames
    ),
    RecordType.STATUS: st.builds(
        Status, modem_times, steps(10, -32767, 32767, True), steps(1000, 0, 65534, True),
        st.sampled_from(PaState), steps(100, 0, 65534, True),
    ),
    RecordType.RESET: st.builds(Reset, modem_times, st.sampled_from(ResetReason)),
    RecordType.ERROR: st.builds(ErrorAnswer, st.sampled_from(ErrorCode), st.integers(0, 255)),
}
any_record = st.one_of(*RECORDS.values())


def same(a: Any, b: Any) -> bool:
    """Records equal field by field, NaN equal to NaN (not measured is not measured)."""
    if type(a) is not type(b):
        return False
    return all(
        (isinstance(x, float) and isinstance(y, float) and math.isnan(x) and math.isnan(y)) or x == y
        for x, y in zip(a, b, strict=True)
    )


def test_every_record_type_has_a_strategy() -> None:
    assert set(RECORDS) == set(RecordType) == set(records.RECORD_KINDS)
    assert HOST_TO_MODEM | MODEM_TO_HOST == set(RecordType)
    assert HOST_TO_MODEM & MODEM_TO_HOST == {RecordType.ERROR}


@pytest.mark.property
@given(any_record)
def test_round_trip(record: Any) -> None:
    body = encode_record_body(record)
    assert same(decode_record_body(body), record)
    assert len(body) <= MAX_SERIAL_PAYLOAD
    assert binascii.crc_hqx(body, 0xFFFF) == 0  # the CRC closes the record
    assert body[0] >> 4 == 1 and body[0] & 0x0F == records.record_type_of(record)


@pytest.mark.property
@given(st.lists(any_record, max_size=8), st.data())
def test_round_trip_through_the_dialect_in_any_pieces(batch: list[Any], data: st.DataObject) -> None:
    ours = dialect("ionotrail")
    line = b"".join(ours.encode(r) for r in batch)
    for side in Side:
        accepted = MODEM_TO_HOST if side is Side.HOST else HOST_TO_MODEM
        stream = ours.stream(side)
        cuts = sorted(data.draw(st.lists(st.integers(0, len(line)), max_size=6)))
        out: list[Any] = []
        for start, end in zip([0, *cuts], [*cuts, len(line)], strict=True):
            out += stream.feed(line[start:end])
        expected = [r if records.record_type_of(r) in accepted else "wrong" for r in batch]
        got = ["wrong" if isinstance(r, LineError) and r.reason == "wrong_direction" else r for r in out]
        assert len(got) == len(expected) and all(same(g, e) or g == e for g, e in zip(got, expected, strict=True))


# --- worked examples: bytes written out by hand from the declarations -----------------------


def crc(head_and_fields: bytes) -> bytes:
    return binascii.crc_hqx(head_and_fields, 0xFFFF).to_bytes(2, "big")


EXAMPLES = [
    (Transmit(0x0102, b"\xaa\xbb"), bytes.fromhex("11 0102 aabb")),
    (ProbeStart(0.1, b"\x11"), bytes.fromhex("12 0064 11")),
    (ProbeStop(), bytes.fromhex("13")),
    (Listen(True), bytes.fromhex("14 80")),
    (Listen(False), bytes.fromhex("14 00")),
    (Configure(49_000_000, 49_100_000, 4800, 12.5), bytes.fromhex("15 02ebae40 02ed34e0 000012c0 007d")),
    (StatusQuery(), bytes.fromhex("16")),
    (Transmitted(7, False, 0.25), bytes.fromhex("18 0007 00 0003d090")),
    (Received(1.5, -3.25, 120.5, b"\x12"), bytes.fromhex("19 000000000016e360 febb 000004b5 12")),
    (Received(0.0, math.nan, math.nan, b"\x12"), bytes.fromhex("19 0000000000000000 8000 80000000 12")),
    (Status(2.0, -10.5, 12.0, PaState.FAULT, math.nan), bytes.fromhex("1a 00000000001e8480 ff97 2ee0 02 ffff")),
    (Reset(0.000001, ResetReason.BROWN_OUT), bytes.fromhex("1b 0000000000000001 02")),
    (ErrorAnswer(ErrorCode.MALFORMED, 1), bytes.fromhex("1c 02 01")),
]


@pytest.mark.parametrize(("record", "fields"), EXAMPLES, ids=[type(r).__name__ for r, _ in EXAMPLES])
def test_worked_examples(record: Any, fields: bytes) -> None:
    assert encode_record_body(record) == fields + crc(fields)
    assert same(decode_record_body(fields + crc(fields)), record)


def test_the_largest_record_is_max_serial_payload() -> None:
    largest = Received(MAX_MODEM_TIME_US / 1e6, 1.0, 1.0, bytes(MAX_RECORD_FRAME_BYTES))
    assert len(encode_record_body(largest)) == MAX_SERIAL_PAYLOAD
    assert max(records.record_bytes(kind) for kind in records.RECORD_KINDS.values()) == MAX_SERIAL_PAYLOAD


# --- refusals ------------------------------------------------------------------------------


def sealed(fields: bytes) -> bytes:
    return fields + crc(fields)


REFUSALS = [
    ("empty", b"", Reason.TRUNCATED),
    ("head only", b"\x13", Reason.TRUNCATED),
    ("too long", sealed(b"\x19" + bytes(MAX_SERIAL_PAYLOAD)), Reason.TOO_LONG),
    ("bad CRC", bytes.fromhex("13 0000"), Reason.BAD_CRC),
    ("version 2", sealed(b"\x23"), Reason.UNSUPPORTED_VERSION),
    ("type 7", sealed(b"\x17"), Reason.UNKNOWN_TYPE),
    ("type 0", sealed(b"\x10"), Reason.UNKNOWN_TYPE),
    ("field cut short", sealed(bytes.fromhex("1c 02")), Reason.TRUNCATED),
    ("bytes left over", sealed(bytes.fromhex("1c 02 01 00")), Reason.BAD_LENGTH),
    ("reserved bit set", sealed(bytes.fromhex("14 81")), Reason.BAD_FIELD),
    ("no frame", sealed(bytes.fromhex("11 0001")), Reason.BAD_FIELD),
    ("frame too long", sealed(b"\x11\x00\x01" + bytes(MAX_RECORD_FRAME_BYTES + 1)), Reason.BAD_FIELD),
    ("probe interval 0", sealed(bytes.fromhex("12 0000 11")), Reason.BAD_FIELD),
    ("bit rate 0", sealed(bytes.fromhex("15 00000001 00000001 00000000 0001")), Reason.BAD_FIELD),
    ("PA state 3", sealed(bytes.fromhex("1a 0000000000000000 0000 0000 03 0000")), Reason.BAD_FIELD),
    ("reset reason 9", sealed(bytes.fromhex("1b 0000000000000000 09")), Reason.BAD_FIELD),
    ("error code 0", sealed(bytes.fromhex("1c 00 01")), Reason.BAD_FIELD),
    ("modem time past 2^50 us", sealed(bytes.fromhex("1b 0004000000000001 00")), Reason.BAD_FIELD),
]


@pytest.mark.parametrize(("what", "data", "reason"), REFUSALS, ids=[r[0] for r in REFUSALS])
def test_refusals(what: str, data: bytes, reason: Reason) -> None:
    with pytest.raises(DecodeError) as caught:
        decode_record_body(data)
    assert caught.value.reason is reason
    assert "record" in caught.value.message


MISUSE = [
    lambda: Transmit(-1, b"x"),
    lambda: Transmit(0, b""),
    lambda: Transmit(0, "text"),
    lambda: ProbeStart(0.0, b"x"),
    lambda: ProbeStart(65.536, b"x"),
    lambda: Listen(1),
    lambda: Configure(0, 0, 0, 1.0),
    lambda: Configure(2**32, 0, 1, 1.0),
    lambda: Configure(0, 0, 1, math.nan),
    lambda: Transmitted(0, 1, 0.1),
    lambda: Transmitted(0, True, -0.1),
    lambda: Received(-1.0, 0.0, 0.0, b"x"),
    lambda: Received(0.0, 400.0, 0.0, b"x"),
    lambda: Received(0.0, math.inf, 0.0, b"x"),
    lambda: Status(0.0, 0.0, 0.0, 7, 0.0),
    lambda: Reset(0.0, 9),
    lambda: ErrorAnswer(0, 0),
    lambda: ErrorAnswer(ErrorCode.MALFORMED, 256),
    lambda: encode_record_body(Received(math.nan, 0.0, 0.0, b"x")),  # our dialect needs the time
    lambda: encode_record_body(("not", "a record")),  # type: ignore[arg-type]
    lambda: decode_record_body("text"),  # type: ignore[arg-type]
]


@pytest.mark.parametrize("call", MISUSE)
def test_misuse_is_a_usage_error(call: Any) -> None:
    with pytest.raises(UsageError):
        call()


def test_values_are_kept_at_wire_resolution() -> None:
    assert ProbeStart(0.1004, b"x").interval_s == 0.1
    assert Configure(1, 1, 1, 5.04).power_w == 5.0
    assert Received(1.0000004, 12.344, 0.04, b"x")[:3] == (1.0, 12.34, 0.0)


# --- the ionotrail dialect: three ways, errors and answers ------------------------------------

HOST_RECORDS = [r for r, _ in EXAMPLES if records.record_type_of(r) in HOST_TO_MODEM]


def line_of(batch: list[Any]) -> bytes:
    return b"".join(DIALECTS["ionotrail"].encode(r) for r in batch)


def test_three_ways() -> None:
    line = line_of(HOST_RECORDS)
    whole = dialect("ionotrail").stream(Side.MODEM).feed(line)
    assert len(whole) == len(HOST_RECORDS) and all(same(a, b) for a, b in zip(whole, HOST_RECORDS, strict=True))
    stream = dialect("ionotrail").stream(Side.MODEM)
    single = [r for i in range(len(line)) for r in stream.feed(line[i : i + 1])]
    assert single == whole
    stream = dialect("ionotrail").stream(Side.MODEM)
    assert stream.feed(line + b"\x05\x11garbage") == whole  # trailing bytes wait for their delimiter
    assert stream.buffered == 9
    assert stream.counters["records"] == len(HOST_RECORDS)


def test_wrong_direction_is_answered() -> None:
    stream = dialect("ionotrail").stream(Side.HOST)
    out = stream.feed(line_of([Transmit(1, b"x")]))
    assert out == [LineError("wrong_direction", int(RecordType.TRANSMIT), True)]
    assert error_answer(out[0]) == ErrorAnswer(ErrorCode.UNKNOWN_TYPE, int(RecordType.TRANSMIT))
    assert stream.counters["wrong_direction"] == 1


@pytest.mark.parametrize(
    ("body", "expected"),
    [
        (bytes.fromhex("13 0000"), LineError("bad_crc", 0, True)),
        (sealed(b"\x23"), LineError("unsupported_version", 0, True)),
        (sealed(b"\x17"), LineError("unknown_type", 7, True)),
        (sealed(bytes.fromhex("14 81")), LineError("malformed", int(RecordType.LISTEN), True)),
        (sealed(bytes.fromhex("1c 00 01")), LineError("malformed", int(RecordType.ERROR), False)),  # never answer an error
        (bytes.fromhex("1c 02 01 0000"), LineError("bad_crc", 0, False)),  # it looks like an error: no answer
    ],
)
def test_refused_records_become_line_errors(body: bytes, expected: LineError) -> None:
    stream = dialect("ionotrail").stream(Side.MODEM)
    follower = StatusQuery()
    assert stream.feed(encode_record(body) + line_of([follower])) == [expected, follower]
    assert stream.counters[expected.reason] == 1 and stream.counters["records"] == 1
    if expected.answer:
        assert error_answer(expected).code is records.ErrorCode[expected.reason.upper()] or expected.reason == "wrong_direction"


def test_line_noise_costs_only_the_damaged_record() -> None:
    stream = dialect("ionotrail").stream(Side.MODEM)
    bad_cobs = b"\x05\x01\x00"  # a code byte promising four bytes, then the delimiter
    flood = b"\xff" * (2 * MAX_SERIAL_PAYLOAD) + b"\x00"
    out = stream.feed(bad_cobs + line_of([ProbeStop()]) + flood + line_of([StatusQuery()]))
    assert out == [LineError("bad_line_code", 0, False), ProbeStop(), LineError("overrun", 0, False), StatusQuery()]
    assert stream.buffered == 0


def test_dialect_names() -> None:
    assert dialect("ionotrail").name == "ionotrail" and dialect("kiss").name == "kiss"
    assert all(dialect("ionotrail").carries(t) for t in RecordType)
    with pytest.raises(UsageError, match="ionotrail, kiss"):
        dialect("ax25")
    with pytest.raises(UsageError):
        dialect("ionotrail").stream("host")  # type: ignore[arg-type]


def test_counters_name_every_reason() -> None:
    for name in DIALECTS:
        counters = dialect(name).stream(Side.HOST).counters
        assert {"records", *LINE_ERROR_REASONS} <= set(counters)


# --- hostile bytes never raise -------------------------------------------------------------


@pytest.mark.property
@given(st.binary(max_size=2 * MAX_SERIAL_PAYLOAD), st.sampled_from(list(Side)), st.sampled_from(sorted(DIALECTS)))
def test_hostile_bytes_never_raise(data: bytes, side: Side, name: str) -> None:
    stream = dialect(name).stream(side)
    for item in stream.feed(data) + stream.feed(b"\x00\xc0"):
        assert isinstance(item, LineError) or records.record_type_of(item) in stream.accepted
    assert stream.buffered <= 2 * MAX_SERIAL_PAYLOAD


@pytest.mark.property
@given(any_record, st.integers(0, 2**32))
def test_a_damaged_record_is_refused_not_raised(record: Any, seed: int) -> None:
    body = bytearray(encode_record_body(record))
    rng = random.Random(seed)  # hypothesis picks the seed, so the damage replays
    for _ in range(rng.randint(1, 3)):
        body[rng.randrange(len(body))] ^= 1 << rng.randrange(8)
    try:
        decode_record_body(bytes(body))
    except DecodeError:
        pass
    for side in Side:
        stream = dialect("ionotrail").stream(side)
        stream.feed(encode_record(bytes(body)))


def test_decode_never_raises_outside_its_family_on_seeded_noise() -> None:
    rng = random.Random(10)  # a fixed seed: the same hostile inputs every run
    for _ in range(20_000):
        data = bytes(rng.getrandbits(8) for _ in range(rng.randint(0, 40)))
        if data and rng.random() < 0.5:
            data = sealed(bytes([0x10 | rng.randint(0, 15)]) + data)  # valid CRC, so fields get parsed
        try:
            decode_record_body(data)
        except DecodeError:
            pass


# --- what docs/modem.md and docs/wire.md state in prose -------------------------------------

DOCS = Path(__file__).resolve().parent.parent / "docs"


def test_sizes_and_example_stated_in_prose() -> None:
    modem, wire = (" ".join((DOCS / name).read_text(encoding="utf-8").split()) for name in ("modem.md", "wire.md"))
    encoded = cobs_encoded_max(MAX_SERIAL_PAYLOAD)
    frame = MAX_RECORD_FRAME_BYTES
    assert f"The largest record is {MAX_SERIAL_PAYLOAD} bytes (a received record with a {frame}-byte frame)" in modem
    assert f"at most {encoded} bytes once encoded" in modem
    assert f"the modem's {MAX_RECORD_METADATA_BYTES} bytes of metadata" in wire
    assert f"a record is at most {MAX_SERIAL_PAYLOAD} bytes, at most {encoded} encoded" in wire
    body = encode_record_body(Transmit(0x0102, bytes.fromhex("1200a1")))
    assert f"Record: `{body.hex(' ')}`" in modem
    assert f"on the line: `{encode_record(body).hex(' ')}`" in modem


# --- ionotrail decode --cobs reads records ---------------------------------------------------


def test_decode_cobs_prints_records_and_their_frames(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from ionotrail.harness.cli.main import main
    from ionotrail.terminal.wire import Fragment, encode

    frame = encode(Fragment(1, 2, 3, 0, b"ok"))
    ours = dialect("ionotrail")
    capture = tmp_path / "line.bin"
    capture.write_bytes(ours.encode(Received(1.5, 8.25, math.nan, frame)) + ours.encode(Status(2.0, 21.5, 12.1, PaState.ON, math.nan)))
    assert main(["decode", "--cobs", "--file", str(capture)]) == 0
    out = capsys.readouterr().out
    assert "#1  received record" in out and "offset_hz     not measured" in out
    assert "#1.frame  fragment frame" in out and "#2  status record" in out and "pa             on" in out
    assert main(["decode", "--cobs", "--json", "--file", str(capture)]) == 0
    lines = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    assert [line.get("record") or line.get("type") for line in lines] == ["received", "fragment", "status"]
    assert lines[0]["fields"]["offset_hz"] is None and lines[0]["fields"]["frame"] == frame.hex()


def test_decode_cobs_refused_records_exit_1(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from ionotrail.harness.cli.main import main

    capture = tmp_path / "line.bin"
    capture.write_bytes(encode_record(bytes.fromhex("13 0000")) + encode_record(sealed(bytes.fromhex("19 00"))))
    assert main(["decode", "--cobs", "--file", str(capture)]) == 1
    err = capsys.readouterr().err
    assert "#1: error: bad_crc: record" in err and "#2: error: truncated: record" in err
