"""The hand-written fragment codec is byte-identical to the construct declaration.

Differential: for valid fragments both encoders give the same bytes and both
decoders the same frame; for any input that starts like a fragment, both
decoders accept it or both refuse it with the same error class.
"""

from __future__ import annotations

import pytest
from hypothesis import given
from hypothesis import strategies as st

from harness import strategies
from harness.fuzz import hostile_inputs
from terminal.crc import crc16
from terminal.errors import DecodeError
from terminal.limits import MAX_FRAME_BYTES
from terminal.wire import Fragment
from terminal.wire.codec import decode_with_construct, encode_with_construct
from terminal.wire.fastpath import HEAD_BYTE, decode_fragment, encode_fragment


def _outcome(decoder: object, data: bytes) -> object:
    try:
        return decoder(data)  # type: ignore[operator]
    except DecodeError as exc:
        return type(exc)


@pytest.mark.property
@given(strategies.fragments())
def test_encoders_agree(fragment: Fragment) -> None:
    assert encode_fragment(fragment) == encode_with_construct(fragment)


@pytest.mark.property
@given(strategies.fragments())
def test_decoders_agree_on_valid_fragments(fragment: Fragment) -> None:
    wire = encode_with_construct(fragment)
    assert decode_fragment(wire) == decode_with_construct(wire) == fragment


@st.composite
def fragment_like(draw: st.DrawFn) -> bytes:
    body = bytes([HEAD_BYTE]) + draw(st.binary(max_size=MAX_FRAME_BYTES + 4))
    if draw(st.booleans()):  # a valid CRC takes the input past the first check
        return body + crc16(body).to_bytes(2, "big")
    return body


@pytest.mark.property
@given(fragment_like())
def test_decoders_agree_on_hostile_input(data: bytes) -> None:
    assert _outcome(decode_fragment, data) == _outcome(decode_with_construct, data)


def test_decoders_agree_on_fuzzed_fragments() -> None:
    corpus = [encode_fragment(Fragment(0x0A31, 7, 9, off, bytes(n), final=f)) for off, n, f in ((0, 1, False), (8000, 192, True), (40, 256, False))]
    checked = 0
    for data in hostile_inputs(seed=3, count=5_000, corpus=corpus):
        if data[:1] == bytes([HEAD_BYTE]):
            assert _outcome(decode_fragment, data) == _outcome(decode_with_construct, data), data.hex()
            checked += 1
    assert checked > 1000
