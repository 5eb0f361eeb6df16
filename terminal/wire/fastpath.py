"""Hand-written codec for data fragments, the one frame on the hot path.

The interpreted construct declaration decodes a fragment in about 40 us;
the simulator and a master serving many terminals need a few microseconds
(``ionotrail bench codec`` measures both side by side).  This module encodes
and decodes exactly the layout of ``formats.FRAGMENT`` with :mod:`struct`;
a differential property test (tests/test_fastpath.py) proves the two
byte-identical in both directions, errors included.
"""

from __future__ import annotations

import struct

from terminal.crc import crc16
from terminal.errors import BadField, CrcMismatch, FrameTooLong, TruncatedFrame, UsageError
from terminal.limits import (
    FORMAT_VERSION,
    FRAGMENT_HEADER_BYTES,
    FRAME_CRC_BYTES,
    MAX_FRAME_BYTES,
    MAX_MESSAGE_STREAM,
    MIN_FRAME_BYTES,
    OFFSET_BITS,
)
from terminal.wire.formats import FrameType
from terminal.wire.frames import Fragment, check_fragment_span

HEAD_BYTE = (FORMAT_VERSION << 4) | FrameType.FRAGMENT
"""First byte of every fragment of this format version."""

_HEADER = struct.Struct(">BHBHH")  # head, terminal, master, message_id, position
_CRC = struct.Struct(">H")
_unpack_header = _HEADER.unpack_from
_FINAL = 1 << 15
_URGENT = 1 << 14
_DOWNLINK = 1 << 13
_OFFSET_MASK = (1 << OFFSET_BITS) - 1
_OVERHEAD = FRAGMENT_HEADER_BYTES + FRAME_CRC_BYTES
_new = tuple.__new__

assert _HEADER.size == FRAGMENT_HEADER_BYTES


def encode_fragment(fragment: Fragment) -> bytes:
    """Bytes on the air for ``fragment`` (already validated by its constructor)."""
    position = fragment.offset
    if fragment.final:
        position |= _FINAL
    if fragment.urgent:
        position |= _URGENT
    if fragment.downlink:
        position |= _DOWNLINK
    body = _HEADER.pack(HEAD_BYTE, fragment.terminal, fragment.master, fragment.message_id, position) + fragment.payload
    return body + _CRC.pack(crc16(body))


def decode_fragment(data: bytes) -> Fragment:
    """Decode untrusted bytes whose first byte is :data:`HEAD_BYTE`.

    Checks run in the same order as the generic decoder (size, CRC, fields)
    so that both give the same error for the same input.
    """
    size = len(data)
    if size > MAX_FRAME_BYTES:
        raise FrameTooLong(f"frame of {size} bytes exceeds the {MAX_FRAME_BYTES}-byte maximum")
    if size < MIN_FRAME_BYTES:
        raise TruncatedFrame(f"{size} bytes cannot hold a type byte and a CRC")
    if crc16(data):  # CRC-16/IBM-3740 of a frame with its CRC appended is 0
        raise CrcMismatch("frame CRC-16 does not match: corrupted on the air or misframed")
    if size < _OVERHEAD:
        raise TruncatedFrame(f"fragment of {size} bytes is shorter than its {_OVERHEAD}-byte header and CRC")
    _, terminal, master, message_id, position = _unpack_header(data)
    offset = position & _OFFSET_MASK
    if size == _OVERHEAD or offset + size - _OVERHEAD > MAX_MESSAGE_STREAM:
        try:  # same rule and message as the constructor
            check_fragment_span(offset, size - _OVERHEAD)
        except UsageError as exc:
            raise BadField(f"fragment frame: {exc}") from None
    return _new(  # type: ignore[no-any-return]
        Fragment,
        (
            terminal,
            master,
            message_id,
            offset,
            data[FRAGMENT_HEADER_BYTES:-FRAME_CRC_BYTES],
            position & _FINAL != 0,
            position & _URGENT != 0,
            position & _DOWNLINK != 0,
        ),
    )
