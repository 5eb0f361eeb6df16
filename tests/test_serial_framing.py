"""COBS serial framing: worked examples and the streaming decoder."""

from __future__ import annotations

import pytest
from hypothesis import given
from hypothesis import strategies as st
from ionotrail.terminal.errors import BadLineCode, UsageError
from ionotrail.terminal.limits import MAX_SERIAL_PAYLOAD, cobs_encoded_max
from ionotrail.terminal.wire.serial_framing import Deframer, decode_record, encode_record

# Worked examples of COBS encoding [Cheshire and Baker, "Consistent Overhead
# Byte Stuffing", IEEE/ACM Trans. Networking 7(2), 1999; example set from memory
# of the paper and of its common restatements], each followed by the 00 delimiter.
EXAMPLES = [
    (b"\x00", b"\x01\x01"),
    (b"\x00\x00", b"\x01\x01\x01"),
    (b"\x11\x22\x00\x33", b"\x03\x11\x22\x02\x33"),
    (b"\x11\x22\x33\x44", b"\x05\x11\x22\x33\x44"),
    (b"\x11\x00\x00\x00", b"\x02\x11\x01\x01\x01"),
    (bytes(range(1, 255)), b"\xff" + bytes(range(1, 255))),
    (b"\x00" + bytes(range(1, 255)), b"\x01\xff" + bytes(range(1, 255))),
]


@pytest.mark.parametrize(("payload", "encoded"), EXAMPLES)
def test_worked_examples(payload: bytes, encoded: bytes) -> None:
    assert encode_record(payload) == encoded + b"\x00"
    assert decode_record(encoded) == payload


def _stream() -> tuple[bytes, list[bytes]]:
    payloads = [p for p, _ in EXAMPLES]
    return b"".join(encode_record(p) for p in payloads), payloads


def test_whole_buffer() -> None:
    line, payloads = _stream()
    assert Deframer().feed(line) == payloads


def test_one_byte_at_a_time() -> None:
    line, payloads = _stream()
    deframer = Deframer()
    out: list[bytes] = []
    for i in range(len(line)):
        out += deframer.feed(line[i : i + 1])
    assert out == payloads


def test_trailing_bytes_wait_for_their_delimiter() -> None:
    line, payloads = _stream()
    deframer = Deframer()
    assert deframer.feed(line + b"\x03\x11") == payloads
    assert deframer.buffered == 2
    assert deframer.feed(b"\x22\x00") == [b"\x11\x22"]


def test_resynchronises_after_line_noise() -> None:
    deframer = Deframer()
    noise = b"\x07\x41\x42"  # claims 6 more bytes, then the line is cut
    out = deframer.feed(noise + b"\x00" + encode_record(b"after"))
    assert out == [b"after"]
    assert deframer.counters.bad_records == 1


def test_overlong_record_is_discarded_and_buffer_stays_bounded() -> None:
    deframer = Deframer()
    flood = b"\xff" * (3 * cobs_encoded_max(MAX_SERIAL_PAYLOAD))
    for i in range(0, len(flood), 100):
        deframer.feed(flood[i : i + 100])
        assert deframer.buffered <= deframer.max_encoded
    assert deframer.feed(b"\x00" + encode_record(b"ok")) == [b"ok"]
    assert deframer.counters.overruns == 1


def test_encoder_refuses_an_oversize_record() -> None:
    with pytest.raises(UsageError):
        encode_record(bytes(MAX_SERIAL_PAYLOAD + 1))


def test_single_record_decoder_names_the_problem() -> None:
    with pytest.raises(BadLineCode, match="not valid COBS"):
        decode_record(b"\x05\x11")


@pytest.mark.property
@given(st.lists(st.binary(max_size=MAX_SERIAL_PAYLOAD), max_size=6), st.lists(st.integers(1, 50), min_size=1))
def test_any_split_delivers_every_record(payloads: list[bytes], cuts: list[int]) -> None:
    line = b"".join(encode_record(p) for p in payloads)
    deframer = Deframer()
    out: list[bytes] = []
    i = k = 0
    while i < len(line):
        step = cuts[k % len(cuts)]
        out += deframer.feed(line[i : i + step])
        i, k = i + step, k + 1
    assert out == payloads
    assert deframer.buffered == 0


@pytest.mark.property
@given(st.binary(max_size=2000))
def test_garbage_never_raises_and_never_overfills(noise: bytes) -> None:
    deframer = Deframer()
    for record in deframer.feed(noise):
        assert len(record) <= MAX_SERIAL_PAYLOAD
    assert deframer.buffered <= deframer.max_encoded
