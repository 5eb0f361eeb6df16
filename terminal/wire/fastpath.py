"""Hand-written codecs for the frames on the hot path: fragment, probe, ack.

The interpreted construct declarations decode a fragment in about 50 us and
an acknowledgement in about 100 us; the simulator and a master serving many
terminals need a few microseconds (``ionotrail bench codec`` and ``ionotrail
bench reassembly`` measure both side by side).  This module encodes and
decodes exactly the layouts of ``formats.FRAGMENT``, ``formats.PROBE`` and
``formats.ACK`` with :mod:`struct`; differential property tests
(tests/test_fastpath.py) prove each byte-identical to its declaration in both
directions, and that both refuse the same inputs with the same error class
(the wording of a message may differ).  Commands and replies are rare and stay on the
declarations.
"""

from __future__ import annotations

import struct

from ionotrail.terminal.errors import BadField, BadLength, CrcMismatch, FrameTooLong, TruncatedFrame, UsageError
from ionotrail.terminal.limits import (
    FORMAT_VERSION,
    FRAGMENT_HEADER_BYTES,
    FRAME_CRC_BYTES,
    MAX_FRAME_BYTES,
    MAX_MESSAGE_STREAM,
    MIN_FRAME_BYTES,
    OFFSET_BITS,
)
from ionotrail.terminal.wire.crc import crc16
from ionotrail.terminal.wire.formats import FrameType
from ionotrail.terminal.wire.frames import Ack, AckBlock, CommandBlock, Fragment, Probe, check_fragment_span

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


def _close(body: bytes) -> bytes:
    """The frame: its fields, then their CRC-16."""
    return body + _CRC.pack(crc16(body))


def encode_fragment(fragment: Fragment) -> bytes:
    """Bytes on the air for ``fragment`` (already validated by its constructor)."""
    position = fragment.offset
    if fragment.final:
        position |= _FINAL
    if fragment.urgent:
        position |= _URGENT
    if fragment.downlink:
        position |= _DOWNLINK
    return _close(_HEADER.pack(HEAD_BYTE, fragment.terminal, fragment.master, fragment.message_id, position) + fragment.payload)


def decode_fragment(data: bytes) -> Fragment:
    """Decode untrusted bytes whose first byte is :data:`HEAD_BYTE`.

    Checks run in the same order as the generic decoder (size, CRC, fields)
    so that both give the same error for the same input; the envelope checks
    of :func:`check_envelope` are written out here to save a call per frame.
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


# --- probes and acknowledgements -------------------------------------------------------
#
# Every probe a terminal hears and every acknowledgement is decoded on the
# hot path too: through the interpreted declaration an acknowledgement costs
# about 100 us each way, half the time of a whole message exchange in
# ``ionotrail bench reassembly``.  These readers follow the declarations field
# by field, in order, so that the first problem found is the one the
# declaration would report.

PROBE_HEAD = (FORMAT_VERSION << 4) | FrameType.PROBE
ACK_HEAD = (FORMAT_VERSION << 4) | FrameType.ACK

_U16 = struct.Struct(">H")
_ACK_FIXED = struct.Struct(">HHB")  # terminal, message_id, status
_RANGE = struct.Struct(">HH")
_PROBE_FIXED = struct.Struct(">BBHB")  # head, master, sequence, flags
_STATUS_COMPLETE, _STATUS_DOWNLINK, _STATUS_REFUSED, _STATUS_RESERVED = 0x80, 0x40, 0x20, 0x10
_FLAG_POLL, _FLAG_ACK, _FLAG_COMMAND, _FLAG_RESERVED = 0x80, 0x40, 0x20, 0x1F


def check_envelope(data: bytes) -> int:
    """Size and CRC checks shared by every frame; returns the size."""
    size = len(data)
    if size > MAX_FRAME_BYTES:
        raise FrameTooLong(f"frame of {size} bytes exceeds the {MAX_FRAME_BYTES}-byte maximum")
    if size < MIN_FRAME_BYTES:
        raise TruncatedFrame(f"{size} bytes cannot hold a type byte and a CRC")
    if crc16(data):
        raise CrcMismatch("frame CRC-16 does not match: corrupted on the air or misframed")
    return size


def _cut_short(name: str, size: int) -> TruncatedFrame:
    return TruncatedFrame(f"{name} frame of {size} bytes ends inside a field")


def _read_ack_block(data: bytes, pos: int, end: int, name: str) -> tuple[tuple[int, ...], int]:
    """Raw ack-block fields from ``data[pos:end]``: (values, new position)."""
    if pos + _ACK_FIXED.size > end:
        raise _cut_short(name, end + FRAME_CRC_BYTES)
    terminal, message_id, status = _ACK_FIXED.unpack_from(data, pos)
    if status & _STATUS_RESERVED:
        raise BadField(f"{name} frame: reserved bit of the acknowledgement status is set")
    pos += _ACK_FIXED.size
    count = status & 0x0F
    if pos + count * _RANGE.size > end:
        raise _cut_short(name, end + FRAME_CRC_BYTES)
    ranges = tuple(_RANGE.unpack_from(data, pos + i * _RANGE.size) for i in range(count))
    return (terminal, message_id, ranges, status), pos + count * _RANGE.size


def _ack_block(values: tuple[object, ...], name: str) -> AckBlock:
    terminal, message_id, ranges, status = values
    try:
        return AckBlock(
            terminal,  # type: ignore[arg-type]
            message_id,  # type: ignore[arg-type]
            ranges,  # type: ignore[arg-type]
            bool(status & _STATUS_COMPLETE),  # type: ignore[operator]
            bool(status & _STATUS_DOWNLINK),  # type: ignore[operator]
            bool(status & _STATUS_REFUSED),  # type: ignore[operator]
        )
    except UsageError as exc:
        raise BadField(f"{name} frame: {exc}") from None


def _leftover(name: str, extra: int) -> BadLength:
    return BadLength(f"{name} frame has {extra} bytes between its last field and its CRC")


def _pack_ack_block(block: AckBlock) -> bytes:
    status = len(block.ranges)
    if block.complete:
        status |= _STATUS_COMPLETE
    if block.downlink:
        status |= _STATUS_DOWNLINK
    if block.refused:
        status |= _STATUS_REFUSED
    return _ACK_FIXED.pack(block.terminal, block.message_id, status) + b"".join(_RANGE.pack(s, e) for s, e in block.ranges)


def encode_ack(frame: Ack) -> bytes:
    return _close(bytes((ACK_HEAD, frame.master)) + _pack_ack_block(frame.ack))


def decode_ack(data: bytes) -> Ack:
    """Decode untrusted bytes whose first byte is :data:`ACK_HEAD`."""
    size = check_envelope(data)
    end = size - FRAME_CRC_BYTES
    if end < 2:
        raise _cut_short("ack", size)
    values, pos = _read_ack_block(data, 2, end, "ack")
    if pos != end:
        raise _leftover("ack", end - pos)
    return _new(Ack, (data[1], _ack_block(values, "ack")))  # type: ignore[no-any-return]


def encode_probe(frame: Probe) -> bytes:
    flags = 0
    parts = [b""]
    if frame.poll is not None:
        flags |= _FLAG_POLL
        parts.append(_U16.pack(frame.poll))
    if frame.ack is not None:
        flags |= _FLAG_ACK
        parts.append(_pack_ack_block(frame.ack))
    if frame.command is not None:
        flags |= _FLAG_COMMAND
        c = frame.command
        parts.append(bytes((c.command_id, c.opcode, len(c.arguments))) + c.arguments)
    parts[0] = _PROBE_FIXED.pack(PROBE_HEAD, frame.master, frame.sequence, flags)
    return _close(b"".join(parts))


def decode_probe(data: bytes) -> Probe:
    """Decode untrusted bytes whose first byte is :data:`PROBE_HEAD`."""
    size = check_envelope(data)
    end = size - FRAME_CRC_BYTES
    if end < _PROBE_FIXED.size:
        raise _cut_short("probe", size)
    _, master, sequence, flags = _PROBE_FIXED.unpack_from(data)
    if flags & _FLAG_RESERVED:
        raise BadField("probe frame: reserved probe flag bits are set")
    pos = _PROBE_FIXED.size
    poll = None
    if flags & _FLAG_POLL:
        if pos + 2 > end:
            raise _cut_short("probe", size)
        poll = _U16.unpack_from(data, pos)[0]
        pos += 2
    ack_values = None
    if flags & _FLAG_ACK:
        ack_values, pos = _read_ack_block(data, pos, end, "probe")
    command = None
    if flags & _FLAG_COMMAND:
        if pos + 3 > end:
            raise _cut_short("probe", size)
        command_id, opcode, length = data[pos], data[pos + 1], data[pos + 2]
        pos += 3
        if pos + length > end:
            raise _cut_short("probe", size)
        command = (command_id, opcode, data[pos : pos + length])
        pos += length
    if pos != end:
        raise _leftover("probe", end - pos)
    try:  # semantic rules, through the same constructors as the declaration's path
        return Probe(
            master,
            sequence,
            poll,
            None if ack_values is None else _ack_block(ack_values, "probe"),
            None if command is None else CommandBlock(*command),
        )
    except UsageError as exc:
        raise BadField(f"probe frame: {exc}") from None
