"""Frozen, always-valid representations of every frame.

Each frame is an immutable tuple subclass whose constructor checks every
field against what the wire can carry, raising :class:`UsageError` for a
value no encoder could send.  Decoders build them only from bytes that passed
the same rules, so holding a ``Fragment`` means holding a valid fragment.
(Tuples rather than dataclasses: the data-fragment decoder must run at a few
microseconds a frame, and a frozen dataclass costs twice a tuple to build.)
Every frame and block knows its encoded size (``wire_length``) from sizes
read off the declarations, so a sender can budget airtime without encoding.
"""

from __future__ import annotations

from typing import NamedTuple, Self

from ionotrail.terminal.errors import UsageError
from ionotrail.terminal.limits import (
    AUTH_TAG_BYTES,
    FRAGMENT_OVERHEAD_BYTES,
    MAX_ACK_RANGES,
    MAX_COMMAND_BYTES,
    MAX_FRAGMENT_PAYLOAD,
    MAX_FRAME_BYTES,
    MAX_MESSAGE_STREAM,
)
from ionotrail.terminal.wire import formats, layout
from ionotrail.terminal.wire.formats import FrameType, ReplyStatus
from ionotrail.terminal.wire.layout import IDLE_PROBE_BYTES

# Encoded sizes, read from the declarations: the fixed part of each frame or
# block (with its CRC, for a frame) and the size of each repeated or optional part.
_ACK_BLOCK_FIXED = layout.fixed_bytes(formats.ACK_BLOCK, ("ranges",))
_RANGE_BYTES = layout.size(layout.element(formats.ACK_BLOCK, "ranges"))
_COMMAND_BLOCK_FIXED = layout.fixed_bytes(formats.COMMAND_BLOCK, ("arguments",))  # the tag included
_POLL_BYTES = layout.size(layout.optional(layout.frame_fields(formats.PROBE), "poll"))
_ACK_FIXED = layout.frame_bytes(formats.ACK, ("ack",))
_COMMAND_FIXED = layout.frame_bytes(formats.COMMAND, ("command",))
_REPLY_FIXED = layout.frame_bytes(formats.REPLY, ("result",))
_TAGGED_FIXED = layout.frame_bytes(formats.TAGGED, ("payload",))  # header, epoch, counter, tag and CRC

TAGGED_OVERHEAD_BYTES = _TAGGED_FIXED
"""Frame bytes of an authenticated fragment beyond its payload (24): the 10 of
a plain fragment, plus key epoch, counter and tag."""

MAX_TAGGED_PAYLOAD = MAX_FRAME_BYTES - _TAGGED_FIXED
"""Largest payload of an authenticated fragment (242): the frame stays within
MAX_FRAME_BYTES, the one receive buffer every frame fits."""

_U16 = 0xFFFF
_new = tuple.__new__

ByteRange = tuple[int, int]
"""Half-open ``(start, end)`` range of bytes in a sealed message."""


def _uint(name: str, value: object, bits: int) -> int:
    if not isinstance(value, int) or isinstance(value, bool) or not 0 <= value < (1 << bits):
        raise UsageError(f"{name}={value!r} must be an integer from 0 to {(1 << bits) - 1}")
    return value


def _bytes(name: str, value: object, most: int) -> bytes:
    if not isinstance(value, (bytes, bytearray, memoryview)):
        raise UsageError(f"{name} must be bytes, not {type(value).__name__}")
    data = bytes(value)
    if len(data) > most:
        raise UsageError(f"{name} is {len(data)} bytes; at most {most} fit")
    return data


def _tag(value: object) -> bytes:
    data = _bytes("tag", value, AUTH_TAG_BYTES)
    if len(data) != AUTH_TAG_BYTES:
        raise UsageError(f"tag is {len(data)} bytes; the format carries exactly {AUTH_TAG_BYTES}")
    return data


def check_ranges(ranges: object) -> tuple[ByteRange, ...]:
    """Validate held ranges: ascending, disjoint, non-adjacent, non-empty."""
    # A tuple of (start, end) tuples of plain ints that keeps the rules is
    # returned as it is, after one pass of comparisons (every acknowledgement
    # a reassembler makes is such a tuple); anything else takes the full check,
    # which builds the same tuple or says what is wrong.
    if type(ranges) is tuple and len(ranges) <= MAX_ACK_RANGES:
        previous_end = -1
        for item in ranges:
            if type(item) is not tuple or len(item) != 2:
                break
            start, end = item
            if type(start) is not int or type(end) is not int or not previous_end < start < end:
                break
            previous_end = end
        else:
            if previous_end <= MAX_MESSAGE_STREAM:
                return ranges
    return _check_ranges_fully(ranges)


def _check_ranges_fully(ranges: object) -> tuple[ByteRange, ...]:
    """:func:`check_ranges`, field by field, with a message for the first rule broken."""
    if not isinstance(ranges, (tuple, list)):
        raise UsageError(f"ranges must be a sequence of (start, end), not {type(ranges).__name__}")
    if len(ranges) > MAX_ACK_RANGES:
        raise UsageError(f"{len(ranges)} ranges; an acknowledgement holds at most {MAX_ACK_RANGES}")
    out: list[ByteRange] = []
    previous_end = -1
    for item in ranges:
        if not isinstance(item, (tuple, list)) or len(item) != 2:
            raise UsageError(f"range {item!r} must be a (start, end) pair")
        start, end = _uint("range start", item[0], 16), _uint("range end", item[1], 16)
        if not start < end <= MAX_MESSAGE_STREAM:
            raise UsageError(f"range ({start}, {end}) must satisfy start < end <= {MAX_MESSAGE_STREAM}")
        if start <= previous_end:
            raise UsageError(f"range ({start}, {end}) overlaps or touches the one before; merge them")
        out.append((start, end))
        previous_end = end
    return tuple(out)


class _AckBlockFields(NamedTuple):
    terminal: int
    message_id: int
    ranges: tuple[ByteRange, ...]
    complete: bool
    downlink: bool
    refused: bool


class AckBlock(_AckBlockFields):
    """Which bytes of one message the receiver holds, or that it has it all
    (``complete``), or that it will never deliver it (``refused``: its id is
    older than the receiver's duplicate window, or it is larger than the
    receiver accepts)."""

    __slots__ = ()

    def __new__(
        cls,
        terminal: int,
        message_id: int,
        ranges: tuple[ByteRange, ...] = (),
        complete: bool = False,
        downlink: bool = False,
        refused: bool = False,
    ) -> Self:
        checked = check_ranges(ranges)
        if (complete or refused) and checked:
            raise UsageError("a complete or refused acknowledgement carries no ranges")
        if complete and refused:
            raise UsageError("an acknowledgement is complete or refused, not both")
        if type(terminal) is not int or not 0 <= terminal <= _U16:  # plain ints in range pass as they are
            terminal = _uint("terminal", terminal, 16)
        if type(message_id) is not int or not 0 <= message_id <= _U16:
            message_id = _uint("message_id", message_id, 16)
        return _new(cls, (terminal, message_id, checked, bool(complete), bool(downlink), bool(refused)))

    @property
    def wire_length(self) -> int:
        """Encoded bytes of this block, without encoding it."""
        return _ACK_BLOCK_FIXED + _RANGE_BYTES * len(self.ranges)


class _CommandBlockFields(NamedTuple):
    command_id: int
    opcode: int
    arguments: bytes
    epoch: int
    counter: int
    tag: bytes


NO_TAG = bytes(AUTH_TAG_BYTES)
"""The tag of a block not yet signed (no key accepts it)."""


class CommandBlock(_CommandBlockFields):
    """One downlink command: an id the reply echoes, an opcode, its arguments,
    and its authentication (key epoch, counter, tag; docs/keys.md)."""

    __slots__ = ()

    def __new__(
        cls, command_id: int, opcode: int, arguments: bytes = b"", epoch: int = 0, counter: int = 0, tag: bytes = NO_TAG
    ) -> Self:
        return super().__new__(
            cls,
            _uint("command_id", command_id, 8),
            _uint("opcode", opcode, 8),
            _bytes("arguments", arguments, MAX_COMMAND_BYTES),
            _uint("epoch", epoch, 16),
            _uint("counter", counter, 32),
            _tag(tag),
        )

    @property
    def wire_length(self) -> int:
        """Encoded bytes of this block, without encoding it."""
        return _COMMAND_BLOCK_FIXED + len(self.arguments)


class _ProbeFields(NamedTuple):
    master: int
    sequence: int
    poll: int | None
    ack: AckBlock | None
    command: CommandBlock | None


class Probe(_ProbeFields):
    """The master's beacon, optionally polling a terminal, acknowledging a
    message and carrying a command for the polled terminal."""

    __slots__ = ()
    frame_type = FrameType.PROBE

    def __new__(
        cls,
        master: int,
        sequence: int,
        poll: int | None = None,
        ack: AckBlock | None = None,
        command: CommandBlock | None = None,
    ) -> Self:
        if poll is not None:
            _uint("poll", poll, 16)
        if ack is not None and not isinstance(ack, AckBlock):
            raise UsageError(f"ack must be an AckBlock, not {type(ack).__name__}")
        if command is not None:
            if not isinstance(command, CommandBlock):
                raise UsageError(f"command must be a CommandBlock, not {type(command).__name__}")
            if poll is None:
                raise UsageError("a probe carries a command only for the terminal it polls; set poll")
        return super().__new__(cls, _uint("master", master, 8), _uint("sequence", sequence, 16), poll, ack, command)

    @property
    def wire_length(self) -> int:
        """Bytes on the air, CRC included, without encoding."""
        length = IDLE_PROBE_BYTES
        if self.poll is not None:
            length += _POLL_BYTES
        if self.ack is not None:
            length += self.ack.wire_length
        if self.command is not None:
            length += self.command.wire_length
        return length


class _FragmentFields(NamedTuple):
    terminal: int
    master: int
    message_id: int
    offset: int
    payload: bytes
    final: bool
    urgent: bool
    downlink: bool


class Fragment(_FragmentFields):
    """Bytes ``[offset, offset + len(payload))`` of a sealed message between a
    terminal and a master; ``downlink`` says which way it travels."""

    __slots__ = ()
    frame_type = FrameType.FRAGMENT

    def __new__(
        cls,
        terminal: int,
        master: int,
        message_id: int,
        offset: int,
        payload: bytes,
        final: bool = False,
        urgent: bool = False,
        downlink: bool = False,
    ) -> Self:
        data = _bytes("payload", payload, MAX_FRAGMENT_PAYLOAD)
        check_fragment_span(_uint("offset", offset, 13), len(data))
        return super().__new__(
            cls,
            _uint("terminal", terminal, 16),
            _uint("master", master, 8),
            _uint("message_id", message_id, 16),
            offset,
            data,
            bool(final),
            bool(urgent),
            bool(downlink),
        )

    @property
    def end(self) -> int:
        """One past the last message byte this fragment carries."""
        return self.offset + len(self.payload)

    @property
    def wire_length(self) -> int:
        """Bytes on the air, CRC included, without encoding."""
        return FRAGMENT_OVERHEAD_BYTES + len(self.payload)


def check_fragment_span(offset: int, length: int) -> None:
    """A fragment carries at least one byte and stays inside the message space."""
    if length == 0:
        raise UsageError("a fragment carries at least one payload byte")
    if offset + length > MAX_MESSAGE_STREAM:
        raise UsageError(f"fragment [{offset}, {offset + length}) runs past the {MAX_MESSAGE_STREAM}-byte message limit")


class _AckFields(NamedTuple):
    master: int
    ack: AckBlock


class Ack(_AckFields):
    """A stand-alone acknowledgement frame."""

    __slots__ = ()
    frame_type = FrameType.ACK

    def __new__(cls, master: int, ack: AckBlock) -> Self:
        if not isinstance(ack, AckBlock):
            raise UsageError(f"ack must be an AckBlock, not {type(ack).__name__}")
        return super().__new__(cls, _uint("master", master, 8), ack)

    @property
    def wire_length(self) -> int:
        """Bytes on the air, CRC included, without encoding."""
        return _ACK_FIXED + self.ack.wire_length


class _CommandFields(NamedTuple):
    master: int
    terminal: int
    command: CommandBlock


class Command(_CommandFields):
    """A stand-alone downlink command frame."""

    __slots__ = ()
    frame_type = FrameType.COMMAND

    def __new__(cls, master: int, terminal: int, command: CommandBlock) -> Self:
        if not isinstance(command, CommandBlock):
            raise UsageError(f"command must be a CommandBlock, not {type(command).__name__}")
        return super().__new__(cls, _uint("master", master, 8), _uint("terminal", terminal, 16), command)

    @property
    def wire_length(self) -> int:
        """Bytes on the air, CRC included, without encoding."""
        return _COMMAND_FIXED + self.command.wire_length


class _ReplyFields(NamedTuple):
    terminal: int
    master: int
    command_id: int
    status: ReplyStatus
    result: bytes
    epoch: int
    counter: int
    tag: bytes


class Reply(_ReplyFields):
    """A terminal's answer to a downlink command."""

    __slots__ = ()
    frame_type = FrameType.REPLY

    def __new__(
        cls,
        terminal: int,
        master: int,
        command_id: int,
        status: ReplyStatus,
        result: bytes = b"",
        epoch: int = 0,
        counter: int = 0,
        tag: bytes = NO_TAG,
    ) -> Self:
        try:
            checked_status = ReplyStatus(status)
        except ValueError:
            raise UsageError(f"status={status!r} is not one of {[s.value for s in ReplyStatus]}") from None
        return super().__new__(
            cls,
            _uint("terminal", terminal, 16),
            _uint("master", master, 8),
            _uint("command_id", command_id, 8),
            checked_status,
            _bytes("result", result, MAX_COMMAND_BYTES),
            _uint("epoch", epoch, 16),
            _uint("counter", counter, 32),
            _tag(tag),
        )

    @property
    def wire_length(self) -> int:
        """Bytes on the air, CRC included, without encoding."""
        return _REPLY_FIXED + len(self.result)


class _AuthFragmentFields(NamedTuple):
    fragment: Fragment
    epoch: int
    counter: int
    tag: bytes


class AuthFragment(_AuthFragmentFields):
    """A fragment with its authentication: the key epoch and data counter its
    tag was made with, and the tag (docs/keys.md).  Holding one says nothing of
    whether the tag is right; only the receiver's key can tell."""

    __slots__ = ()
    frame_type = FrameType.TAGGED

    def __new__(cls, fragment: Fragment, epoch: int, counter: int, tag: bytes) -> Self:
        if not isinstance(fragment, Fragment):
            raise UsageError(f"fragment must be a Fragment, not {type(fragment).__name__}")
        if len(fragment.payload) > MAX_TAGGED_PAYLOAD:
            raise UsageError(
                f"payload is {len(fragment.payload)} bytes; an authenticated fragment carries at most {MAX_TAGGED_PAYLOAD}"
            )
        return super().__new__(cls, fragment, _uint("epoch", epoch, 16), _uint("counter", counter, 32), _tag(tag))

    @property
    def wire_length(self) -> int:
        """Bytes on the air, CRC included, without encoding."""
        return _TAGGED_FIXED + len(self.fragment.payload)


Frame = Probe | Fragment | Ack | Command | Reply | AuthFragment
"""Any frame representation."""
