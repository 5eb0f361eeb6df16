"""The hand-written codecs are byte-identical to the construct declarations,
and a changed declaration cannot leave them stale.

Differential, for each fast-path frame type (fragment, probe, ack): for valid
frames both encoders give the same bytes and both decoders the same frame;
for any input that starts like such a frame, both decoders accept it or both
refuse it with the same error class and reason code (message wording may differ).
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
from ionotrail.terminal.errors import DecodeError
from ionotrail.terminal.limits import MAX_FRAME_BYTES
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
