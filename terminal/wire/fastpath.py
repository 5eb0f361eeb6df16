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

import struct
from operator import lt as _lt

from ionotrail.terminal.errors import BadField, BadLength, CrcMismatch, FrameTooLong, TruncatedFrame, UsageError
from ionotrail.terminal.limits import (
    FRAGMENT_OVERHEAD_BYTES,
    FRAME_CRC_BYTES,
    MAX_ACK_RANGES,
    MAX_COMMAND_BYTES,
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
    size,
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
#
# What they build skips the representations' constructors when the values
# keep the constructors' rules (a check of a few comparisons; the constructors
# check each field again and cost several times the whole decode): a frame
# that breaks a rule is handed to the constructor, which refuses it with its
# own message, after every structural check, as the declaration's path does.
# One precompiled struct per range count reads or writes a whole acknowledgement
# block in one call; the master's endpoint keeps its blocks encoded
# (:func:`pack_ack_block`, :func:`pack_command_block`) and puts each probe
# together from them (:func:`assemble_probe`).

PROBE_HEAD = head_byte(FrameType.PROBE)
ACK_HEAD = head_byte(FrameType.ACK)

_PROBE_FIXED = packer(_PROBE, ("head", "master", "sequence", "flags"), "probe")
_FLAGS_AT = packer(_PROBE, ("head", "master", "sequence"), "probe").size
_POLL = single(optional(_PROBE, "poll"), "probe poll")
_PROBE_POLLED = struct.Struct(_PROBE_FIXED.format + _POLL.format.lstrip(">"))
_ACK_FRAME_FIXED = packer(_ACK, ("head", "master"), "ack")
_ACK_FIXED = packer(formats.ACK_BLOCK, ("terminal", "message_id", "status"), "ack block")
_STATUS_AT = packer(formats.ACK_BLOCK, ("terminal", "message_id"), "ack block").size
_RANGE = packer(element(formats.ACK_BLOCK, "ranges"), ("start", "end"), "ack range")
_COMMAND_FIXED = packer(formats.COMMAND_BLOCK, ("command_id", "opcode", "epoch", "counter", "length"), "command block")
_TAG_BYTES = size(member(formats.COMMAND_BLOCK, "tag"), "command tag")
_STATUS = bits(formats.ACK_BLOCK, "status", ("complete", "downlink", "refused", "reserved", "count"))
_STATUS_COMPLETE = _STATUS["complete"].mask
_STATUS_DOWNLINK = _STATUS["downlink"].mask
_STATUS_REFUSED = _STATUS["refused"].mask
_STATUS_RESERVED = _STATUS["reserved"].mask
_STATUS_COUNT = _STATUS["count"].mask
_STATUS_ENDED = _STATUS_COMPLETE | _STATUS_REFUSED
_FLAGS = bits(_PROBE, "flags", ("poll", "ack", "command", "reserved"))
_FLAG_POLL = _FLAGS["poll"].mask
_FLAG_ACK = _FLAGS["ack"].mask
_FLAG_COMMAND = _FLAGS["command"].mask
_FLAG_RESERVED = _FLAGS["reserved"].mask
_PROBE_FIXED_BYTES = _PROBE_FIXED.size
_PROBE_POLLED_BYTES = _PROBE_POLLED.size
_ACK_FRAME_FIXED_BYTES = _ACK_FRAME_FIXED.size
_ACK_FIXED_BYTES = _ACK_FIXED.size
_COMMAND_FIXED_BYTES = _COMMAND_FIXED.size
_ACK_BLOCKS = tuple(struct.Struct(_ACK_FIXED.format + _RANGE.format.lstrip(">") * n) for n in range(_STATUS_COUNT + 1))
"""A whole acknowledgement block with n ranges: terminal, message id, status, then the ranges' ends in order."""

expect_names(formats.ACK_BLOCK, ("terminal", "message_id", "status", "ranges"), "ack block")
expect_names(formats.COMMAND_BLOCK, ("command_id", "opcode", "epoch", "counter", "length", "arguments", "tag"), "command block")
if _STATUS["count"].shift != 0:
    raise StaleLayout("ack status: the fast path reads the range count in the low bits")
if _STATUS_COUNT != MAX_ACK_RANGES:
    raise StaleLayout(f"ack status: the range count holds up to {_STATUS_COUNT}; limits say {MAX_ACK_RANGES}")
if _ACK_FIXED_BYTES != _STATUS_AT + 1 or _PROBE_FIXED_BYTES != _FLAGS_AT + 1:
    raise StaleLayout("the ack status and the probe flags are read as single bytes, after the fields before them")
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


def _read_ack_block(data: bytes, pos: int, end: int, name: str) -> tuple[AckBlock, bool, int]:
    """The ack block in ``data[pos:end]``: (block, whether it keeps AckBlock's
    rules, new position).  A block that breaks them is built all the same and
    refused later by :func:`_refuse_ack_block`, once the rest of the frame has
    passed its structural checks."""
    if pos + _ACK_FIXED_BYTES > end:
        raise _cut_short(name, end + FRAME_CRC_BYTES)
    status = data[pos + _STATUS_AT]
    if status & _STATUS_RESERVED:
        raise BadField(f"{name} frame: reserved bit of the acknowledgement status is set")
    count = status & _STATUS_COUNT
    block = _ACK_BLOCKS[count]
    after = pos + block.size
    if after > end:
        raise _cut_short(name, end + FRAME_CRC_BYTES)
    fields = block.unpack_from(data, pos)
    # AckBlock's rules for ranges: every start < end, each range after the one
    # before without touching it (the ends strictly ascending), the last within
    # the message space; and none on a complete or refused acknowledgement.
    ranges: tuple[tuple[int, int], ...]
    if count == 1:  # the common case (a message received in order so far), written out
        start, stop = fields[3], fields[4]
        ranges = ((start, stop),)
        valid = not status & _STATUS_ENDED and start < stop <= MAX_MESSAGE_STREAM
    elif count:
        ends = fields[3:]
        pairs = iter(ends)
        ranges = tuple(zip(pairs, pairs))
        valid = not status & _STATUS_ENDED and ends[-1] <= MAX_MESSAGE_STREAM and all(map(_lt, ends, ends[1:]))
    else:
        ranges = ()
        valid = status & _STATUS_ENDED != _STATUS_ENDED  # complete and refused are exclusive
    ack = _new(
        AckBlock,
        (
            fields[0],
            fields[1],
            ranges,
            status & _STATUS_COMPLETE != 0,
            status & _STATUS_DOWNLINK != 0,
            status & _STATUS_REFUSED != 0,
        ),
    )
    return ack, valid, after


def _refuse_ack_block(block: AckBlock, name: str) -> AckBlock:
    """The constructor's verdict on a block that breaks its rules (raises BadField)."""
    try:
        return AckBlock(*block)
    except UsageError as exc:
        raise BadField(f"{name} frame: {exc}") from None


def _leftover(name: str, extra: int) -> BadLength:
    return BadLength(f"{name} frame has {extra} bytes between its last field and its CRC")


def pack_ack_block(block: AckBlock) -> bytes:
    """The wire bytes of an acknowledgement block (as it rides in a probe or an ack frame)."""
    terminal, message_id, ranges, complete, downlink, refused = block
    status = len(ranges)
    if complete:
        status |= _STATUS_COMPLETE
    if downlink:
        status |= _STATUS_DOWNLINK
    if refused:
        status |= _STATUS_REFUSED
    if ranges:
        return _ACK_BLOCKS[len(ranges)].pack(terminal, message_id, status, *sum(ranges, ()))
    return _ACK_FIXED.pack(terminal, message_id, status)


def pack_command_block(block: CommandBlock) -> bytes:
    """The wire bytes of a command block (as it rides in a probe)."""
    command_id, opcode, arguments, epoch, counter, tag = block
    return _COMMAND_FIXED.pack(command_id, opcode, epoch, counter, len(arguments)) + arguments + tag


def encode_ack(frame: Ack) -> bytes:
    body = _ACK_FRAME_FIXED.pack(ACK_HEAD, frame.master) + pack_ack_block(frame.ack)
    return body + _CRC.pack(crc16(body))


def decode_ack(data: bytes) -> Ack:
    """Decode untrusted bytes whose first byte is :data:`ACK_HEAD`."""
    size = check_envelope(data)
    end = size - FRAME_CRC_BYTES
    if end < _ACK_FRAME_FIXED_BYTES:
        raise _cut_short("ack", size)
    block, valid, pos = _read_ack_block(data, _ACK_FRAME_FIXED_BYTES, end, "ack")
    if pos != end:
        raise _leftover("ack", end - pos)
    return _new(Ack, (_ACK_FRAME_FIXED.unpack_from(data)[1], block if valid else _refuse_ack_block(block, "ack")))


def assemble_probe(master: int, sequence: int, poll: int | None, ack: bytes | None, command: bytes | None) -> bytes:
    """A probe's bytes from valid field values and its blocks already encoded
    (:func:`pack_ack_block`, :func:`pack_command_block`; None: absent).  The
    caller answers for the values: a master, a sequence and a poll that
    :class:`Probe` accepts, and a command only with a poll."""
    flags = 0
    if ack is not None:
        flags |= _FLAG_ACK
    if poll is None:
        body = _PROBE_FIXED.pack(PROBE_HEAD, master, sequence, flags)
    else:
        flags |= _FLAG_POLL
        if command is not None:
            flags |= _FLAG_COMMAND
        body = _PROBE_POLLED.pack(PROBE_HEAD, master, sequence, flags, poll)
    if ack is not None:
        body += ack
    if command is not None:
        body += command
    return body + _CRC.pack(crc16(body))


def encode_probe(frame: Probe) -> bytes:
    master, sequence, poll, ack, command = frame
    return assemble_probe(
        master,
        sequence,
        poll,
        None if ack is None else pack_ack_block(ack),
        None if command is None else pack_command_block(command),
    )


def decode_probe(data: bytes) -> Probe:
    """Decode untrusted bytes whose first byte is :data:`PROBE_HEAD`."""
    size = check_envelope(data)
    end = size - FRAME_CRC_BYTES
    if end < _PROBE_FIXED_BYTES:
        raise _cut_short("probe", size)
    flags = data[_FLAGS_AT]
    if flags & _FLAG_RESERVED:
        raise BadField("probe frame: reserved probe flag bits are set")
    if flags & _FLAG_POLL:
        if end < _PROBE_POLLED_BYTES:
            raise _cut_short("probe", size)
        _, master, sequence, _, poll = _PROBE_POLLED.unpack_from(data)
        pos = _PROBE_POLLED_BYTES
    else:
        _, master, sequence, _ = _PROBE_FIXED.unpack_from(data)
        poll = None
        pos = _PROBE_FIXED_BYTES
    ack = None
    valid = True
    if flags & _FLAG_ACK:
        ack, valid, pos = _read_ack_block(data, pos, end, "probe")
    command = None
    if flags & _FLAG_COMMAND:
        if pos + _COMMAND_FIXED_BYTES > end:
            raise _cut_short("probe", size)
        command_id, opcode, epoch, counter, length = _COMMAND_FIXED.unpack_from(data, pos)
        pos += _COMMAND_FIXED_BYTES
        if pos + length + _TAG_BYTES > end:
            raise _cut_short("probe", size)
        command = (command_id, opcode, data[pos : pos + length], epoch, counter, data[pos + length : pos + length + _TAG_BYTES])
        pos += length + _TAG_BYTES
    if pos != end:
        raise _leftover("probe", end - pos)
    if valid and (command is None or (poll is not None and len(command[2]) <= MAX_COMMAND_BYTES)):
        return _new(Probe, (master, sequence, poll, ack, None if command is None else _new(CommandBlock, command)))
    try:  # a rule broken: the constructors refuse it, in the order of the declaration's path
        return Probe(
            master,
            sequence,
            poll,
            None if ack is None else _refuse_ack_block(ack, "probe"),
            None if command is None else CommandBlock(*command),
        )
    except UsageError as exc:
        raise BadField(f"probe frame: {exc}") from None
