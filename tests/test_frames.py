"""Frame representations and their codec: round trips, layout, validation."""

from __future__ import annotations

import enum

import pytest
from hypothesis import given
from hypothesis import strategies as st
from ionotrail.harness.testing import strategies
from ionotrail.terminal.errors import BadField, BadLength, DecodeError, MessageCrcMismatch, TruncatedFrame, UsageError
from ionotrail.terminal.limits import (
    FRAGMENT_HEADER_BYTES,
    FRAGMENT_OVERHEAD_BYTES,
    FRAME_CRC_BYTES,
    MAX_FRAME_BYTES,
    MAX_MESSAGE_STREAM,
)
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
    formats,
    values,
)
from ionotrail.terminal.wire.codec import decode_with_construct, encode_with_construct, seal_message, unseal_message
from ionotrail.terminal.wire.crc import crc16
from ionotrail.terminal.wire.frames import _check_ranges_fully, check_ranges


def _with_crc(body: bytes) -> bytes:
    return body + crc16(body).to_bytes(2, "big")


@pytest.mark.property
@pytest.mark.parametrize(
    "strategy",
    [strategies.probes(), strategies.fragments(), strategies.acks, strategies.commands, strategies.replies],
    ids=["probe", "fragment", "ack", "command", "reply"],
)
@given(data=strategies.st.data())
def test_round_trip_every_frame_type(strategy: object, data: strategies.st.DataObject) -> None:
    frame = data.draw(strategy)  # type: ignore[arg-type]
    wire = encode(frame)
    assert len(wire) <= MAX_FRAME_BYTES
    assert decode(wire) == frame
    assert type(decode(wire)) is type(frame)
    assert decode_with_construct(wire) == frame
    assert encode_with_construct(frame) == wire


@pytest.mark.property
@pytest.mark.parametrize(
    "strategy",
    [strategies.probes(), strategies.fragments(), strategies.acks, strategies.commands, strategies.replies],
    ids=["probe", "fragment", "ack", "command", "reply"],
)
@given(data=strategies.st.data())
def test_frames_know_their_wire_length(strategy: object, data: strategies.st.DataObject) -> None:
    frame = data.draw(strategy)  # type: ignore[arg-type]
    assert frame.wire_length == len(encode(frame)) == len(encode_with_construct(frame))


@pytest.mark.property
@given(block=strategies.ack_blocks(), command=strategies.command_blocks)
def test_blocks_know_their_wire_length(block: AckBlock, command: CommandBlock) -> None:
    # A block's length is what it adds to an ack frame or a command frame.
    assert len(encode(Ack(7, block))) - len(encode(Ack(7, AckBlock(1, 1)))) == block.wire_length - AckBlock(1, 1).wire_length
    assert block.wire_length == len(formats.ACK_BLOCK.build(values.ack_fields(Ack(7, block))["ack"]))
    assert command.wire_length == len(formats.COMMAND_BLOCK.build(values.command_fields(Command(7, 1, command))["command"]))


def test_wire_lengths_by_hand() -> None:
    # From docs/wire.md's tables: fragment 8 + payload + 2; probe 5 + poll 2 +
    # ack block (5 + 4 per range) + command block (9 + arguments + 8-byte tag) + 2;
    # ack 2 + block + 2; command 4 + block + 2; reply 13 + result + 8-byte tag + 2.
    assert Fragment(1, 2, 3, 0, b"abc").wire_length == 13
    assert Probe(7, 1, poll=5, ack=AckBlock(5, 9, ((0, 4), (8, 9))), command=CommandBlock(1, 2, b"xy")).wire_length == 41
    assert Ack(7, AckBlock(5, 9, complete=True)).wire_length == 9
    assert Command(7, 5, CommandBlock(1, 2, b"xyz")).wire_length == 26
    assert Reply(5, 7, 1, ReplyStatus.OK, b"ok").wire_length == 25


def test_fragment_overhead_is_ten_bytes() -> None:
    # The design budget: header plus CRC at most 10 bytes (docs/wire.md).
    wire = encode(Fragment(1, 2, 3, 0, b"x"))
    assert FRAGMENT_HEADER_BYTES + FRAME_CRC_BYTES == FRAGMENT_OVERHEAD_BYTES == 10
    assert len(wire) == 10 + 1


def test_fragment_layout_by_hand() -> None:
    # Worked by hand from docs/wire.md: head 0x12 (version 1, type 2), terminal
    # 0x0A31, master 7, message 1234 = 0x04D2, position final|offset 40 = 0x8028.
    wire = encode(Fragment(0x0A31, 7, 1234, 40, b"AB", final=True))
    assert wire[:-2] == bytes.fromhex("120a310704d280284142")
    assert wire[-2:] == crc16(wire[:-2]).to_bytes(2, "big")


def test_probe_layout_by_hand() -> None:
    # head 0x11, master 7, sequence 4711 = 0x1267, flags: poll only = 0x80, poll 0x0A31.
    assert encode(Probe(7, 4711, poll=0x0A31))[:-2] == bytes.fromhex("11071267800a31")


def test_ack_layout_by_hand() -> None:
    # head 0x13, master 7, terminal 0x0A31, message 0x04D3, status count 1 = 0x01, range 0..40.
    block = AckBlock(0x0A31, 1235, ((0, 40),))
    assert encode(Ack(7, block))[:-2] == bytes.fromhex("13070a3104d30100000028")


@pytest.mark.parametrize(
    ("build", "message"),
    [
        (lambda: Fragment(70000, 1, 1, 0, b"x"), "terminal=70000"),
        (lambda: Fragment(1, 256, 1, 0, b"x"), "master=256"),
        (lambda: Fragment(1, 1, 1, 0, b""), "at least one payload byte"),
        (lambda: Fragment(1, 1, 1, MAX_MESSAGE_STREAM - 1, b"xy"), "runs past"),
        (lambda: Fragment(1, 1, 1, 0, bytes(257)), "at most 256"),
        (lambda: AckBlock(1, 1, ((5, 5),)), "start < end"),
        (lambda: AckBlock(1, 1, ((0, 5), (5, 9))), "overlaps or touches"),
        (lambda: AckBlock(1, 1, ((0, 5),), complete=True), "no ranges"),
        (lambda: AckBlock(1, 1, refused=True, complete=True), "not both"),
        (lambda: AckBlock(1, 1, tuple((2 * i, 2 * i + 1) for i in range(16))), "at most 15"),
        (lambda: Probe(1, 1, command=CommandBlock(1, 1)), "set poll"),
        (lambda: Reply(1, 1, 1, 99), "status=99"),
        (lambda: CommandBlock(1, 1, bytes(65)), "at most 64"),
        (lambda: Fragment(True, 1, 1, 0, b"x"), "terminal=True"),
    ],
)
def test_constructors_refuse_what_the_wire_cannot_carry(build: object, message: str) -> None:
    with pytest.raises(UsageError, match=message.replace("(", r"\(")):
        build()  # type: ignore[operator]


def test_encode_refuses_a_non_frame() -> None:
    with pytest.raises(UsageError):
        encode(("not", "a", "frame"))  # type: ignore[arg-type]


def test_reserved_bits_are_refused() -> None:
    probe = bytearray(encode(Probe(7, 1))[:-2])
    probe[4] |= 0x01  # a reserved flag bit
    with pytest.raises(BadField):
        decode(_with_crc(bytes(probe)))


def test_bytes_between_last_field_and_crc_are_refused() -> None:
    reply = encode(Reply(1, 2, 3, ReplyStatus.OK, b"ab"))[:-2]
    with pytest.raises(BadLength, match="2 bytes between"):
        decode(_with_crc(reply + b"zz"))


def test_a_field_cut_short_is_truncation() -> None:
    command = encode(Command(7, 9, CommandBlock(1, 2, b"abcdef")))[:-2]
    with pytest.raises(TruncatedFrame):
        decode(_with_crc(command[:-3]))


def test_unordered_ranges_from_the_air_are_a_field_error() -> None:
    body = bytes.fromhex("13070a3104d302") + bytes.fromhex("0010 0020 0000 0005".replace(" ", ""))
    with pytest.raises(BadField, match="overlaps or touches"):
        decode(_with_crc(body))


def test_every_prefix_of_a_frame_is_refused() -> None:
    # Fed short, a decoder must refuse, never return a partial frame.
    for frame in (Probe(7, 1, poll=3, ack=AckBlock(3, 4, ((0, 9),))), Fragment(3, 7, 4, 0, b"data")):
        wire = encode(frame)
        for cut in range(len(wire)):
            with pytest.raises(DecodeError):
                decode(wire[:cut])


def test_sealed_message_round_trip_and_corruption() -> None:
    sealed = seal_message(b"stage=1.84m")
    assert len(sealed) == len(b"stage=1.84m") + 4
    assert unseal_message(sealed) == b"stage=1.84m"
    damaged = bytes([sealed[0] ^ 1]) + sealed[1:]
    with pytest.raises(MessageCrcMismatch):
        unseal_message(damaged)
    with pytest.raises(TruncatedFrame):
        unseal_message(b"\x01\x02")
    with pytest.raises(UsageError):
        seal_message(bytes(MAX_MESSAGE_STREAM))


def test_decode_accepts_bytearray_and_memoryview() -> None:
    wire = encode(Fragment(1, 2, 3, 0, b"abc"))
    assert decode(bytearray(wire)) == decode(memoryview(wire)) == decode(wire)


def test_decode_refuses_text_as_caller_misuse() -> None:
    with pytest.raises(UsageError):
        decode("12ab")  # type: ignore[arg-type]


# --- the quick pass of check_ranges agrees with the full check ------------------------


class _Small(enum.IntEnum):
    TEN = 10
    TWENTY = 20


_values = st.one_of(
    st.integers(-2, MAX_MESSAGE_STREAM + 2),
    st.sampled_from([0, 1, MAX_MESSAGE_STREAM, 0xFFFF, 0x10000, -1, True, False, _Small.TEN, _Small.TWENTY, 1.0, "3", None]),
)
_items = st.one_of(
    st.tuples(_values, _values),
    st.lists(_values, min_size=2, max_size=2),
    st.tuples(_values),
    st.tuples(_values, _values, _values),
    st.sampled_from([None, 5, "ab"]),
)


@st.composite
def _range_inputs(draw: st.DrawFn) -> object:
    """Anything a caller might pass as ranges; often ascending pairs of plain ints, the common case."""
    if draw(st.booleans()):
        count = draw(st.integers(0, 17))
        ends = sorted(draw(st.sets(st.integers(0, MAX_MESSAGE_STREAM + 2), min_size=2 * count, max_size=2 * count)))
        if count and draw(st.booleans()):  # one end nudged: touching, empty or out of order ranges
            i = draw(st.integers(0, 2 * count - 1))
            ends[i] = draw(st.sampled_from([ends[i] - 1, ends[i] + 1, ends[i - 1] if i else 0]))
        pairs: list[object] = [(ends[i], ends[i + 1]) for i in range(0, 2 * count, 2)]
    else:
        pairs = draw(st.lists(_items, max_size=17))
    return draw(st.sampled_from([tuple, list]))(pairs) if draw(st.integers(0, 9)) else draw(st.sampled_from([None, "ranges", {1: 2}]))


def _checked(check: object, ranges: object) -> object:
    try:
        out = check(ranges)  # type: ignore[operator]
    except UsageError as exc:
        return ("refused", str(exc))
    return ("ranges", repr(out), type(out), [type(item) for item in out], [type(x) for item in out for x in item])


@pytest.mark.property
@given(ranges=_range_inputs())
def test_the_quick_pass_of_check_ranges_agrees_with_the_full_check(ranges: object) -> None:
    # check_ranges returns a tuple of plain int pairs that keeps the rules as it
    # is; anything else goes through the full check, whose message it keeps.
    assert _checked(check_ranges, ranges) == _checked(_check_ranges_fully, ranges)


def test_an_ack_block_keeps_what_it_is_given_as_the_full_check_would() -> None:
    # int subclasses pass the full check and are kept as they are; bools are refused.
    block = AckBlock(_Small.TEN, _Small.TWENTY, ((_Small.TEN, _Small.TWENTY),))
    assert block == (10, 20, ((10, 20),), False, False, False)
    assert type(block.terminal) is _Small and type(block.ranges[0][0]) is _Small
    ranges = ((0, 5), (9, 12))
    assert AckBlock(1, 2, ranges).ranges is ranges, "a valid tuple of plain pairs is kept, not copied"
    for bad in (True, -1, 0x10000):
        with pytest.raises(UsageError, match="terminal="):
            AckBlock(bad, 1)
        with pytest.raises(UsageError, match="message_id="):
            AckBlock(1, bad)
