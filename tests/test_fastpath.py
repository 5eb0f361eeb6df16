"""The hand-written codecs are byte-identical to the construct declarations,
and a changed declaration cannot leave them stale.

Differential, for each fast-path frame type (fragment, probe, ack): for valid
frames both encoders give the same bytes and both decoders the same frame;
for any input that starts like such a frame, both decoders accept it or both
refuse it with the same error class and reason code (message wording may differ).
The blocks the master keeps encoded (pack_ack_block, pack_command_block) and
the probes it puts together from them (assemble_probe) are held to the
declarations the same way, and so are frames that are well formed on the wire
but break a rule of the representations, where the fast decoders skip the
constructors for what keeps the rules.
"""

from __future__ import annotations

import importlib.util
from collections.abc import Callable
from types import ModuleType
from typing import Any

import pytest
from construct import BitsInteger, BitStruct, Construct, Flag, GreedyBytes, If, Int16ub, Int32ub, Struct, this
from hypothesis import given
from hypothesis import strategies as st
from ionotrail.harness.testing import strategies
from ionotrail.harness.testing.fuzz import hostile_inputs
from ionotrail.terminal.errors import BadField, DecodeError, Reason
from ionotrail.terminal.limits import MAX_ACK_RANGES, MAX_FRAME_BYTES, MAX_MESSAGE_STREAM
from ionotrail.terminal.wire import Ack, AckBlock, CommandBlock, Fragment, Probe, fastpath, formats, values
from ionotrail.terminal.wire.codec import decode_with_construct, encode_with_construct
from ionotrail.terminal.wire.crc import crc16
from ionotrail.terminal.wire.layout import StaleLayout

PATHS: dict[str, tuple[Any, Callable[[Any], bytes], Callable[[bytes], Any], int]] = {
    "fragment": (strategies.fragments(), fastpath.encode_fragment, fastpath.decode_fragment, fastpath.HEAD_BYTE),
    "probe": (strategies.probes(), fastpath.encode_probe, fastpath.decode_probe, fastpath.PROBE_HEAD),
    "ack": (strategies.acks, fastpath.encode_ack, fastpath.decode_ack, fastpath.ACK_HEAD),
}

CORPUS = {
    "fragment": [
        fastpath.encode_fragment(Fragment(0x0A31, 7, 9, off, bytes(n), final=f))
        for off, n, f in ((0, 1, False), (8000, 192, True), (40, 256, False))
    ],
    "probe": [
        fastpath.encode_probe(Probe(7, 1)),
        fastpath.encode_probe(Probe(7, 2, poll=0x0A31, command=CommandBlock(1, 2, b"\x03\x84"))),
        fastpath.encode_probe(Probe(7, 3, poll=5, ack=AckBlock(5, 9, ((0, 40), (80, 120))), command=CommandBlock(9, 9, bytes(64)))),
        fastpath.encode_probe(Probe(7, 4, ack=AckBlock(5, 9, refused=True))),
    ],
    "ack": [
        fastpath.encode_ack(Ack(7, AckBlock(5, 9, tuple((10 * i, 10 * i + 5) for i in range(15))))),
        fastpath.encode_ack(Ack(7, AckBlock(5, 9, complete=True, downlink=True))),
        fastpath.encode_ack(Ack(7, AckBlock(5, 9, ((0, 1),)))),
    ],
}


def _outcome(decoder: Callable[[bytes], Any], data: bytes) -> object:
    try:
        return ("frame", decoder(data))
    except DecodeError as exc:
        return ("error", type(exc), exc.reason)


@pytest.mark.property
@pytest.mark.parametrize("name", PATHS)
@given(data=st.data())
def test_encoders_agree(name: str, data: st.DataObject) -> None:
    strategy, encode_fast, decode_fast, _ = PATHS[name]
    frame = data.draw(strategy)
    wire = encode_with_construct(frame)
    assert encode_fast(frame) == wire
    assert decode_fast(wire) == decode_with_construct(wire) == frame
    assert repr(decode_fast(wire)) == repr(frame), "the same classes and field types all the way down (True, not 1)"


@st.composite
def _starts_like(draw: st.DrawFn, head: int) -> bytes:
    body = bytes([head]) + draw(st.binary(max_size=MAX_FRAME_BYTES + 4))
    if draw(st.booleans()):  # a valid CRC takes the input past the first check
        return body + crc16(body).to_bytes(2, "big")
    return body


@pytest.mark.property
@pytest.mark.parametrize("name", PATHS)
@given(data=st.data())
def test_decoders_agree_on_hostile_input(name: str, data: st.DataObject) -> None:
    _, _, decode_fast, head = PATHS[name]
    raw = data.draw(_starts_like(head))
    assert _outcome(decode_fast, raw) == _outcome(decode_with_construct, raw)


@pytest.mark.parametrize("name", PATHS)
def test_decoders_agree_on_fuzzed_frames(name: str) -> None:
    _, _, decode_fast, head = PATHS[name]
    checked = accepted = 0
    for raw in hostile_inputs(seed=3, count=6_000, corpus=CORPUS[name]):
        if raw[:1] == bytes([head]):
            fast = _outcome(decode_fast, raw)
            assert fast == _outcome(decode_with_construct, raw), raw.hex()
            checked += 1
            accepted += fast[0] == "frame"
    assert checked > 1000 and accepted > 10


# --- the master's encoded blocks, and rules the wire cannot express ------------------


def _built(declaration: Struct, value: dict[str, Any]) -> bytes:
    return bytes(declaration.build(value))


@pytest.mark.property
@given(probe=strategies.probes())
def test_probes_put_together_from_encoded_blocks_match_the_declaration(probe: Probe) -> None:
    ack = None if probe.ack is None else fastpath.pack_ack_block(probe.ack)
    command = None if probe.command is None else fastpath.pack_command_block(probe.command)
    if probe.ack is not None:
        assert ack == _built(formats.ACK_BLOCK, values.probe_fields(probe)["ack"])
    if probe.command is not None:
        assert command == _built(formats.COMMAND_BLOCK, values.probe_fields(probe)["command"])
    assert fastpath.assemble_probe(probe.master, probe.sequence, probe.poll, ack, command) == encode_with_construct(probe)


_u16 = st.integers(0, 0xFFFF)
_COMPLETE, _DOWNLINK, _REFUSED, _RESERVED = 0x80, 0x40, 0x20, 0x10  # the status bits, by hand from formats.ACK_BLOCK
_POLL, _ACK, _COMMAND = 0x80, 0x40, 0x20  # the probe flags, by hand from formats.PROBE
_ACK_RULES = ("keeps", "at the edge", "empty", "touching", "out of order", "past the end", "complete", "refused", "both", "reserved")


@st.composite
def _ack_block_bytes(draw: st.DrawFn) -> bytes:
    """An ack block well formed on the wire that keeps AckBlock's rules or breaks
    one of them (the reserved bit, a declaration rule, for good measure)."""
    rule = draw(st.sampled_from(_ACK_RULES))
    if rule in ("keeps", "complete", "refused", "both", "reserved") and draw(st.booleans()):
        count = 0  # complete and refused blocks carry none; a partial one may hold nothing yet
    else:
        count = draw(st.integers(2 if rule == "out of order" else 1, MAX_ACK_RANGES))
    ends = sorted(draw(st.sets(st.integers(0, MAX_MESSAGE_STREAM), min_size=2 * count, max_size=2 * count)))
    if count and rule != "keeps":
        k = draw(st.integers(0, 2 * count - 2)) if count > 1 else 0
        if rule == "at the edge":
            ends[-1] = MAX_MESSAGE_STREAM
        elif rule == "empty":  # a range's end at its start
            i = draw(st.integers(0, count - 1))
            ends[2 * i + 1] = ends[2 * i]
        elif rule == "touching":  # the next range starts where one ends
            i = draw(st.integers(0, count - 2)) if count > 1 else None
            if i is None:
                ends[0] = ends[1]
            else:
                ends[2 * i + 2] = ends[2 * i + 1]
        elif rule == "out of order":
            ends[k], ends[k + 1] = ends[k + 1], ends[k]
        elif rule == "past the end":
            ends[-1] = draw(st.integers(MAX_MESSAGE_STREAM + 1, 0xFFFF))
    status = count | draw(st.sampled_from([0, _DOWNLINK]))
    status |= {"complete": _COMPLETE, "refused": _REFUSED, "both": _COMPLETE | _REFUSED, "reserved": _RESERVED}.get(rule, 0)
    block = draw(_u16).to_bytes(2, "big") + draw(_u16).to_bytes(2, "big") + bytes([status])
    return block + b"".join(e.to_bytes(2, "big") for e in ends)


@st.composite
def _ruled_frames(draw: st.DrawFn) -> bytes:
    """A probe or an ack frame, well formed field by field, keeping or breaking
    the representations' rules; now and then cut short or with bytes over before its CRC."""
    if draw(st.booleans()):
        body = bytes([fastpath.ACK_HEAD, draw(st.integers(0, 0xFF))]) + draw(_ack_block_bytes())
    else:
        command = draw(st.sampled_from(["none", "none", "keeps", "no poll", "too long"]))
        flags = draw(st.sampled_from([0, _ACK, _ACK])) | (_COMMAND if command != "none" else 0)
        if command in ("keeps", "too long") or (command == "none" and draw(st.booleans())):
            flags |= _POLL
        body = bytes([fastpath.PROBE_HEAD, draw(st.integers(0, 0xFF))]) + draw(_u16).to_bytes(2, "big") + bytes([flags])
        if flags & _POLL:
            body += draw(_u16).to_bytes(2, "big")
        if flags & _ACK:
            body += draw(_ack_block_bytes())
        if flags & _COMMAND:
            arguments = draw(st.binary(min_size=65, max_size=255) if command == "too long" else st.binary(max_size=64))
            body += bytes([draw(st.integers(0, 0xFF)), draw(st.integers(0, 0xFF)), len(arguments)]) + arguments
    edit = draw(st.sampled_from(["none"] * 8 + ["cut", "extra"]))
    if edit == "cut":
        body = body[: draw(st.integers(1, len(body) - 1))]
    elif edit == "extra":
        body += draw(st.binary(min_size=1, max_size=4))
    return body + crc16(body).to_bytes(2, "big")


@pytest.mark.property
@given(raw=_ruled_frames())
def test_decoders_agree_on_frames_that_break_a_rule(raw: bytes) -> None:
    decode_fast = fastpath.decode_probe if raw[0] == fastpath.PROBE_HEAD else fastpath.decode_ack
    fast, reference = _outcome(decode_fast, raw), _outcome(decode_with_construct, raw)
    assert fast == reference
    if fast[0] == "frame":  # the same classes and field types all the way down (True, not 1)
        assert repr(fast[1]) == repr(reference[1])


def test_frames_that_break_a_rule_are_refused_as_the_declaration_refuses_them() -> None:
    # By hand, one per rule of AckBlock and Probe (frames.py), each a field error both ways.
    ack = bytes([fastpath.ACK_HEAD, 7]) + (0x0A31).to_bytes(2, "big") + (9).to_bytes(2, "big")
    probe = bytes([fastpath.PROBE_HEAD, 7, 0, 1])
    cases = {
        "range start not below its end": ack + bytes([0x01]) + bytes.fromhex("00050005"),
        "ranges touching": ack + bytes([0x02]) + bytes.fromhex("0000000500050009"),
        "ranges out of order": ack + bytes([0x02]) + bytes.fromhex("0010002000000005"),
        "range past the message space": ack + bytes([0x01]) + (0).to_bytes(2, "big") + (MAX_MESSAGE_STREAM + 1).to_bytes(2, "big"),
        "ranges on a complete block": ack + bytes([0x81]) + bytes.fromhex("00000005"),
        "second range past the message space": ack + bytes([0x02]) + bytes.fromhex("000000050009")
        + (MAX_MESSAGE_STREAM + 1).to_bytes(2, "big"),
        "second range empty": ack + bytes([0x02]) + bytes.fromhex("0000000500090009"),
        "ranges on a refused block": ack + bytes([0x22]) + bytes.fromhex("0000000500090010"),
        "complete and refused": ack + bytes([0xA0]),
        # command block: id, opcode, epoch (2), counter (4), length, arguments, tag (8)
        "command without a poll": probe + bytes([0x20, 1, 2, 0, 0, 0, 0, 0, 1, 0]) + bytes(8),
        "command arguments too long": probe + bytes([0xA0, 0, 5, 1, 2, 0, 0, 0, 0, 0, 1, 65]) + bytes(65) + bytes(8),
    }
    for what, body in cases.items():
        raw = body + crc16(body).to_bytes(2, "big")
        decode_fast = fastpath.decode_probe if raw[0] == fastpath.PROBE_HEAD else fastpath.decode_ack
        assert _outcome(decode_fast, raw) == _outcome(decode_with_construct, raw) == ("error", BadField, Reason.BAD_FIELD), what


def test_the_greatest_range_end_is_the_message_space() -> None:
    # The fast readers compare the last end with MAX_MESSAGE_STREAM themselves.
    block = AckBlock(5, 9, ((0, 1), (MAX_MESSAGE_STREAM - 1, MAX_MESSAGE_STREAM)))
    wire = encode_with_construct(Ack(7, block))
    assert fastpath.decode_ack(wire) == decode_with_construct(wire) == Ack(7, block)


# --- a changed declaration cannot leave the fast path stale ----------------------------
#
# The fast path is loaded afresh (a second copy of the module) with one
# declaration replaced: where its layout can follow the change it does, byte
# for byte; where the code assumes more than the declaration says, the load
# fails with StaleLayout.


def _load_fastpath_with(monkeypatch: pytest.MonkeyPatch, **declarations: Any) -> ModuleType:
    for name, declaration in declarations.items():
        monkeypatch.setattr(formats, name, declaration)
    spec = importlib.util.spec_from_file_location("fastpath_under_test", fastpath.__file__)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _fragment_declaration(*position: Construct, message_id: Construct = Int16ub, swap: bool = False) -> Struct:
    addresses = ["master" / formats.MASTER, "terminal" / formats.TERMINAL]
    return formats._framed(
        formats.HEAD,
        *(addresses if swap else addresses[::-1]),
        "message_id" / message_id,
        "position" / BitStruct(*position),
        "payload" / GreedyBytes,
    )


FINAL, URGENT, DOWNLINK = "final" / Flag, "urgent" / Flag, "downlink" / Flag
OFFSET = "offset" / BitsInteger(13)


def test_the_unchanged_declarations_load(monkeypatch: pytest.MonkeyPatch) -> None:
    module = _load_fastpath_with(monkeypatch)
    frame = Fragment(0x0A31, 7, 9, 40, b"AB", final=True)
    assert module.encode_fragment(frame) == fastpath.encode_fragment(frame)


@pytest.mark.property
@given(frame=strategies.fragments())
def test_moved_flag_bits_are_followed(frame: Fragment) -> None:
    # Swap the final and urgent bits in the declaration: the fast path reads
    # its masks from it, so it stays byte-identical to the changed declaration.
    changed = _fragment_declaration(URGENT, FINAL, DOWNLINK, OFFSET)
    with pytest.MonkeyPatch.context() as monkeypatch:
        fresh = _load_fastpath_with(monkeypatch, FRAGMENT=changed)
    value = values.fragment_fields(frame) | {"head": {"version": 1, "type": 2}}
    wire = changed.build({"fields": {"value": value}})
    assert fresh.encode_fragment(frame) == wire
    assert fresh.decode_fragment(wire) == frame
    if frame.final != frame.urgent:  # and the old layout would differ
        assert fastpath.encode_fragment(frame) != wire


@pytest.mark.parametrize(
    ("name", "declaration", "complaint"),
    [
        ("FRAGMENT", _fragment_declaration(FINAL, URGENT, DOWNLINK, OFFSET, message_id=Int32ub), "header and CRC"),
        ("FRAGMENT", _fragment_declaration(FINAL, URGENT, DOWNLINK, OFFSET, swap=True), "fields"),
        ("FRAGMENT", _fragment_declaration(OFFSET, FINAL, URGENT, DOWNLINK), "low bits"),
        ("FRAGMENT", _fragment_declaration(FINAL, URGENT, "relay" / Flag, OFFSET), "position"),
        (
            "PROBE",
            formats._framed(
                formats.HEAD,
                "master" / formats.MASTER,
                "sequence" / Int16ub,
                "flags" / BitStruct("poll" / Flag, "ack" / Flag, "command" / Flag, "relay" / Flag, "r" / BitsInteger(4)),
                "poll" / If(this.flags.poll, formats.TERMINAL),
                "ack" / If(this.flags.ack, formats.ACK_BLOCK),
                "command" / If(this.flags.command, formats.COMMAND_BLOCK),
            ),
            "flags",
        ),
        (
            "ACK_BLOCK",
            Struct(
                "terminal" / formats.TERMINAL,
                "message_id" / Int16ub,
                "status" / BitStruct("count" / BitsInteger(4), "complete" / Flag, "downlink" / Flag, "refused" / Flag, "reserved" / Flag),
                "ranges" / Struct("start" / Int16ub, "end" / Int16ub)[this.status.count],
            ),
            "range count",
        ),
    ],
    ids=["wider-message-id", "addresses-swapped", "offset-in-high-bits", "position-gains-a-flag", "probe-flag-added", "count-in-high-bits"],
)
def test_a_change_the_fast_path_cannot_follow_stops_the_import(
    monkeypatch: pytest.MonkeyPatch, name: str, declaration: Struct, complaint: str
) -> None:
    with pytest.raises(StaleLayout, match=complaint):
        _load_fastpath_with(monkeypatch, **{name: declaration})
