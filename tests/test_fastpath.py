"""The hand-written codecs are byte-identical to the construct declarations.

Differential, for each fast-path frame type (fragment, probe, ack): for valid
frames both encoders give the same bytes and both decoders the same frame;
for any input that starts like such a frame, both decoders accept it or both
refuse it with the same error class and reason code (message wording may differ).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import pytest
from hypothesis import given
from hypothesis import strategies as st
from ionotrail.harness.testing import strategies
from ionotrail.harness.testing.fuzz import hostile_inputs
from ionotrail.terminal.errors import DecodeError
from ionotrail.terminal.limits import MAX_FRAME_BYTES
from ionotrail.terminal.wire import Ack, AckBlock, CommandBlock, Fragment, Probe, fastpath
from ionotrail.terminal.wire.codec import decode_with_construct, encode_with_construct
from ionotrail.terminal.wire.crc import crc16

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
