"""Hand-written codecs for the frames on the hot path: fragment, probe, ack.

The interpreted construct declarations decode a fragment in about 50 us and
an acknowledgement in about 100 us; the simulator and a master serving many
terminals need a few microseconds (``ionotrail bench codec`` and ``ionotrail
bench reassembly`` measure both side by side).  This module encodes and
decodes exactly the layouts of ``formats.FRAGMENT``, ``formats.PROBE`` and
``formats.ACK`` with :mod:`struct`.  Its struct formats, bit masks and head
bytes are read from those declarations at import (:mod:`.layout`), and what
the code assumes beyond them (field order, the offset and range count in the
low bits) is checked there and then, raising ``StaleLayout``; differential property tests
(tests/test_fastpath.py) prove each byte-identical to its declaration in both
directions, and that both refuse the same inputs with the same error class
(the wording of a message may differ).  Commands and replies are rare and stay on the
declarations.
"""

from __future__ import annotations

from ionotrail.terminal.errors import BadField, BadLength, CrcMismatch, FrameTooLong, TruncatedFrame, UsageError
from ionotrail.terminal.limits import (
    FRAGMENT_OVERHEAD_BYTES,
    FRAME_CRC_BYTES,
    MAX_FRAME_BYTES,
    MAX_MESSAGE_STREAM,
    MIN_FRAME_BYTES,
)
from ionotrail.terminal.wire import formats
from ionotrail.terminal.wire.crc import crc16
from ionotrail.terminal.wire.formats import FrameType
from ionotrail.terminal.wire.frames import Ack, AckBlock, CommandBlock, Fragment, Probe, check_fragment_span
from ionotrail.terminal.wire.layout import (
    StaleLayout,
    bits,
    element,
    expect_names,
    frame_fields,
    head_byte,
    member,
    optional,
    packer,
    single,
    trailer_bytes,
)

# Every layout below is read from the declarations at import (see layout.py);
# what the code assumes beyond that is checked here and raises StaleLayout.

_FRAGMENT = frame_fields(formats.FRAGMENT)
_PROBE = frame_fields(formats.PROBE)
_ACK = frame_fields(formats.ACK)

expect_names(_FRAGMENT, ("head", "terminal", "master", "message_id", "position", "payload"), "fragment")
expect_names(_PROBE, ("head", "master", "sequence", "flags", "poll", "ack", "command"), "probe")
expect_names(_ACK, ("head", "master", "ack"), "ack")
if {trailer_bytes(frame) for frame in (formats.FRAGMENT, formats.PROBE, formats.ACK)} != {FRAME_CRC_BYTES}:
    raise StaleLayout(f"a frame's CRC is no longer {FRAME_CRC_BYTES} bytes, as the fast paths read it")

HEAD_BYTE = head_byte(FrameType.FRAGMENT)
"""First byte of every fragment of this format version."""

_HEADER = packer(_FRAGMENT, ("head", "terminal", "master", "message_id", "position"), "fragment header")
_CRC = single(member(formats.FRAGMENT, "crc").checksumfield, "frame CRC")
_unpack_header = _HEADER.unpack_from
_POSITION = bits(_FRAGMENT, "position", ("final", "urgent", "downlink", "offset"))
_FINAL = _POSITION["final"].mask
_URGENT = _POSITION["urgent"].mask
_DOWNLINK = _POSITION["downlink"].mask
_OFFSET_MASK = _POSITION["offset"].mask
_HEADER_BYTES = _HEADER.size
_OVERHEAD = _HEADER_BYTES + FRAME_CRC_BYTES
_new = tuple.__new__

if _POSITION["offset"].shift != 0:
    raise StaleLayout("fragment position: the fast path reads the offset in the low bits")
if _OVERHEAD != FRAGMENT_OVERHEAD_BYTES:
    raise StaleLayout(f"the fragment header and CRC are {_OVERHEAD} bytes; limits say {FRAGMENT_OVERHEAD_BYTES}")


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
    return _new(
        Fragment,
        (
            terminal,
            master,
            message_id,
            offset,
            data[_HEADER_BYTES:-FRAME_CRC_BYTES],
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

PROBE_HEAD = head_byte(FrameType.PROBE)
ACK_HEAD = head_byte(FrameType.ACK)

_PROBE_FIXED = packer(_PROBE, ("head", "master", "sequence", "flags"), "probe")
_POLL = single(optional(_PROBE, "poll"), "probe poll")
_ACK_FRAME_FIXED = packer(_ACK, ("head", "master"), "ack")
_ACK_FIXED = packer(formats.ACK_BLOCK, ("terminal", "message_id", "status"), "ack block")
_RANGE = packer(element(formats.ACK_BLOCK, "ranges"), ("start", "end"), "ack range")
_COMMAND_FIXED = packer(formats.COMMAND_BLOCK, ("command_id", "opcode", "length"), "command block")
_STATUS = bits(formats.ACK_BLOCK, "status", ("complete", "downlink", "refused", "reserved", "count"))
_STATUS_COMPLETE = _STATUS["complete"].mask
_STATUS_DOWNLINK = _STATUS["downlink"].mask
_STATUS_REFUSED = _STATUS["refused"].mask
_STATUS_RESERVED = _STATUS["reserved"].mask
_STATUS_COUNT = _STATUS["count"].mask
_FLAGS = bits(_PROBE, "flags", ("poll", "ack", "command", "reserved"))
_FLAG_POLL = _FLAGS["poll"].mask
_FLAG_ACK = _FLAGS["ack"].mask
_FLAG_COMMAND = _FLAGS["command"].mask
_FLAG_RESERVED = _FLAGS["reserved"].mask

expect_names(formats.ACK_BLOCK, ("terminal", "message_id", "status", "ranges"), "ack block")
expect_names(formats.COMMAND_BLOCK, ("command_id", "opcode", "length", "arguments"), "command block")
if _STATUS["count"].shift != 0:
    raise StaleLayout("ack status: the fast path reads the range count in the low bits")
if (
    optional(_PROBE, "ack") is not formats.ACK_BLOCK
    or optional(_PROBE, "command") is not formats.COMMAND_BLOCK
    or member(_ACK, "ack") is not formats.ACK_BLOCK
):
    raise StaleLayout("a probe's or an ack frame's blocks are no longer the shared declarations")


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


_AckValues = tuple[int, int, tuple[tuple[int, int], ...], int]
"""An ack block's terminal, message id, ranges and status byte, not yet checked."""


def _read_ack_block(data: bytes, pos: int, end: int, name: str) -> tuple[_AckValues, int]:
    """Raw ack-block fields from ``data[pos:end]``: (values, new position)."""
    if pos + _ACK_FIXED.size > end:
        raise _cut_short(name, end + FRAME_CRC_BYTES)
    terminal, message_id, status = _ACK_FIXED.unpack_from(data, pos)
    if status & _STATUS_RESERVED:
        raise BadField(f"{name} frame: reserved bit of the acknowledgement status is set")
    pos += _ACK_FIXED.size
    count = status & _STATUS_COUNT
    if pos + count * _RANGE.size > end:
        raise _cut_short(name, end + FRAME_CRC_BYTES)
    ranges = tuple(_RANGE.unpack_from(data, pos + i * _RANGE.size) for i in range(count))
    return (terminal, message_id, ranges, status), pos + count * _RANGE.size


def _ack_block(values: _AckValues, name: str) -> AckBlock:
    terminal, message_id, ranges, status = values
    try:
        return AckBlock(
            terminal,
            message_id,
            ranges,
            bool(status & _STATUS_COMPLETE),
            bool(status & _STATUS_DOWNLINK),
            bool(status & _STATUS_REFUSED),
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
    return _close(_ACK_FRAME_FIXED.pack(ACK_HEAD, frame.master) + _pack_ack_block(frame.ack))


def decode_ack(data: bytes) -> Ack:
    """Decode untrusted bytes whose first byte is :data:`ACK_HEAD`."""
    size = check_envelope(data)
    end = size - FRAME_CRC_BYTES
    if end < _ACK_FRAME_FIXED.size:
        raise _cut_short("ack", size)
    _, master = _ACK_FRAME_FIXED.unpack_from(data)
    values, pos = _read_ack_block(data, _ACK_FRAME_FIXED.size, end, "ack")
    if pos != end:
        raise _leftover("ack", end - pos)
    return _new(Ack, (master, _ack_block(values, "ack")))


def encode_probe(frame: Probe) -> bytes:
    flags = 0
    parts = [b""]
    if frame.poll is not None:
        flags |= _FLAG_POLL
        parts.append(_POLL.pack(frame.poll))
    if frame.ack is not None:
        flags |= _FLAG_ACK
        parts.append(_pack_ack_block(frame.ack))
    if frame.command is not None:
        flags |= _FLAG_COMMAND
        c = frame.command
        parts.append(_COMMAND_FIXED.pack(c.command_id, c.opcode, len(c.arguments)) + c.arguments)
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
        if pos + _POLL.size > end:
            raise _cut_short("probe", size)
        poll = _POLL.unpack_from(data, pos)[0]
        pos += _POLL.size
    ack_values = None
    if flags & _FLAG_ACK:
        ack_values, pos = _read_ack_block(data, pos, end, "probe")
    command = None
    if flags & _FLAG_COMMAND:
        if pos + _COMMAND_FIXED.size > end:
            raise _cut_short("probe", size)
        command_id, opcode, length = _COMMAND_FIXED.unpack_from(data, pos)
        pos += _COMMAND_FIXED.size
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
