"""Declarations of every over-the-air format: the single source of truth.

Each frame is ``fields`` followed by a CRC-16/IBM-3740 of those fields.  The
first byte of every frame is the *head*: format version in the high nibble,
frame type in the low nibble.  Field documentation is attached to each
declaration with construct's ``*`` operator; docs/wire.md's tables are
generated from these objects (``ionotrail docs``), so edit here, not there.

Which representation, codec and document entry go with each frame type is
recorded once, in :mod:`~ionotrail.terminal.wire.registry`.

construct's *compiled* parsers skip checks and must never see untrusted bytes;
only the interpreted declarations below are used on received data.
"""

from __future__ import annotations

import enum
import io

from construct import (
    BitsInteger,
    BitStruct,
    Bytes,
    Checksum,
    Const,
    Construct,
    ConstructError,
    Flag,
    GreedyBytes,
    If,
    Int8ub,
    Int16ub,
    Int32ub,
    RawCopy,
    Rebuild,
    SizeofError,
    Struct,
    Subconstruct,
    len_,
    stream_read,
    stream_seek,
    stream_tell,
    this,
)
from construct.core import StreamError
from ionotrail.terminal.limits import AUTH_TAG_BYTES, FRAME_CRC_BYTES, MESSAGE_CRC_BYTES, OFFSET_BITS
from ionotrail.terminal.wire.crc import crc16, crc32c


class FrameType(enum.IntEnum):
    """Low nibble of the head byte.  0 and 7-15 are unassigned."""

    PROBE = 1
    FRAGMENT = 2
    ACK = 3
    COMMAND = 4
    REPLY = 5
    TAGGED = 6
    """A fragment with key epoch, counter and tag (optional data authentication, docs/keys.md)."""


class ReplyStatus(enum.IntEnum):
    """Outcome of a downlink command, as reported by the terminal."""

    OK = 0
    UNKNOWN_OPCODE = 1
    BAD_ARGUMENTS = 2
    REFUSED = 3
    RESULT_LOST = 4
    """Executed before a power cut that lost its result (commands run at most once)."""


class LeftoverBytes(ConstructError):  # type: ignore[misc]
    """A frame's fields ended before its trailer began."""


class Body(Subconstruct):  # type: ignore[misc]
    """Everything between here and a fixed-size trailer, parsed by ``subcon``.

    The link layer delimits frames, so a frame's fields run up to its CRC: the
    body is the stream less the trailer.  Fields that end early leave bytes
    over, which is an error (:class:`LeftoverBytes`); fields that need more
    than the body holds are truncated, never read from the trailer.
    """

    def __init__(self, subcon: Construct, trailer: int) -> None:
        super().__init__(subcon)
        self.trailer = trailer

    def _parse(self, stream, context, path):  # type: ignore[no-untyped-def]
        here = stream_tell(stream, path)
        end = stream_seek(stream, 0, 2, path)
        stream_seek(stream, here, 0, path)
        count = end - here - self.trailer
        if count < 0:
            raise StreamError(f"frame ends {-count} bytes before its trailer", path=path)
        inner = io.BytesIO(stream_read(stream, count, path))
        obj = self.subcon._parsereport(inner, context, path)
        extra = count - inner.tell()
        if extra:
            raise LeftoverBytes(f"{extra} bytes between the last field and the trailer", path=path)
        return obj

    def _build(self, obj, stream, context, path):  # type: ignore[no-untyped-def]
        return self.subcon._build(obj, stream, context, path)

    def _sizeof(self, context, path):  # type: ignore[no-untyped-def]
        raise SizeofError("variable: runs to the trailer", path=path)


def _framed(*fields: Construct) -> Struct:
    """A frame: the given fields, then CRC-16/IBM-3740 over all of them."""
    return Struct(
        "fields" / RawCopy(Body(Struct(*fields), FRAME_CRC_BYTES)),
        "crc" / Checksum(Int16ub, crc16, this.fields.data) * "CRC-16/IBM-3740 of every preceding byte",
    )


HEAD = "head" / BitStruct(
    "version" / BitsInteger(4) * "format version (this document: 1)",
    "type" / BitsInteger(4) * "frame type",
) * "version and type"

MASTER = Int8ub * "master-station id"
TERMINAL = Int16ub * "terminal address"

ACK_BLOCK = Struct(
    "terminal" / TERMINAL,
    "message_id" / Int16ub * "message being acknowledged",
    "status"
    / BitStruct(
        "complete" / Flag * "whole message delivered; ranges are empty",
        "downlink" / Flag * "acknowledges a master-to-terminal message",
        "refused" / Flag * "the receiver will never deliver this message; ranges are empty",
        "reserved" / Const(0, BitsInteger(1)) * "zero",
        "count" / Rebuild(BitsInteger(4), len_(this._.ranges)) * "number of held ranges",
    )
    * "flags and range count",
    "ranges"
    / Struct(
        "start" / Int16ub * "first held byte of the sealed message",
        "end" / Int16ub * "one past the last held byte",
    )[this.status.count]
    * "held byte ranges, ascending, disjoint, non-adjacent",
)
"""Selective acknowledgement of one message: which byte ranges the receiver
holds, so that the sender resends only the holes."""

COMMAND_BLOCK = Struct(
    "command_id" / Int8ub * "echoed by the reply; repeats are not re-executed",
    "opcode" / Int8ub * "what to do (0x00-0xEF application defined, 0xF0-0xFF the stack's)",
    "epoch" / Int16ub * "key epoch the tag was made with (docs/keys.md)",
    "counter" / Int32ub * "the master's command counter for this terminal; each value accepted once",
    "length" / Rebuild(Int8ub, len_(this.arguments)) * "argument bytes that follow",
    "arguments" / Bytes(this.length) * "opcode arguments",
    "tag" / Bytes(AUTH_TAG_BYTES) * "truncated HMAC-SHA-256 over every field that affects processing",
)
"""A downlink command for one terminal, authenticated (docs/keys.md)."""

PROBE = _framed(
    HEAD,
    "master" / MASTER,
    "sequence" / Int16ub * "probe counter; lets a terminal report which probe it heard",
    "flags"
    / BitStruct(
        "poll" / Flag * "a poll address follows",
        "ack" / Flag * "an acknowledgement block follows",
        "command" / Flag * "a command block for the polled terminal follows",
        "reserved" / Const(0, BitsInteger(5)) * "zero",
    )
    * "which optional parts follow",
    "poll" / If(this.flags.poll, TERMINAL) * "terminal asked to reply first",
    "ack" / If(this.flags.ack, ACK_BLOCK) * "acknowledgement for any terminal",
    "command" / If(this.flags.command, COMMAND_BLOCK) * "command for the polled terminal",
)
"""Sent by the master continuously.  A terminal that decodes one knows the
trail is open now, in both directions, for a short while."""

POSITION = "position" / BitStruct(
    "final" / Flag * "this fragment ends the message",
    "urgent" / Flag * "alarm priority",
    "downlink" / Flag * "master to terminal (else terminal to master)",
    "offset" / BitsInteger(OFFSET_BITS) * "byte offset of the payload in the sealed message",
) * "flags and offset"

FRAGMENT = _framed(
    HEAD,
    "terminal" / TERMINAL,
    "master" / MASTER,
    "message_id" / Int16ub * "per-direction message counter of the sender",
    POSITION,
    "payload" / GreedyBytes * "bytes of the sealed message; the frame length gives the count",
)
"""A piece of a sealed message.  Offset plus final flag lets the fragment size
change from one opening to the next: any byte range can be sent alone."""

TAGGED = _framed(
    HEAD,
    "terminal" / TERMINAL,
    "master" / MASTER,
    "message_id" / Int16ub * "per-direction message counter of the sender",
    POSITION,
    "epoch" / Int16ub * "key epoch the tag was made with (docs/keys.md)",
    "counter" / Int32ub * "the sender's data counter; each value accepted once, a retransmission takes a new one",
    "payload" / Body(GreedyBytes, AUTH_TAG_BYTES) * "bytes of the sealed message, up to the tag; the frame length gives the count",
    "tag" / Bytes(AUTH_TAG_BYTES) * "truncated HMAC-SHA-256 over every field that affects processing",
)
"""A fragment authenticated on its own (docs/keys.md): the fragment's fields,
then key epoch and counter before the payload and the tag after it, so the
payload still runs to a fixed trailer (the tag and the CRC)."""

ACK = _framed(
    HEAD,
    "master" / MASTER,
    "ack" / ACK_BLOCK * "the acknowledgement",
)
"""A stand-alone acknowledgement, master to terminal or terminal to master."""

COMMAND = _framed(
    HEAD,
    "master" / MASTER,
    "terminal" / TERMINAL,
    "command" / COMMAND_BLOCK * "the command",
)
"""A stand-alone downlink command (when it does not ride in a probe)."""

REPLY = _framed(
    HEAD,
    "terminal" / TERMINAL,
    "master" / MASTER,
    "command_id" / Int8ub * "the command answered",
    "status" / Int8ub * "0 ok, 1 unknown opcode, 2 bad arguments, 3 refused, 4 result lost",
    "epoch" / Int16ub * "key epoch the tag was made with",
    "counter" / Int32ub * "the terminal's reply counter; each value accepted once",
    "length" / Rebuild(Int8ub, len_(this.result)) * "result bytes that follow",
    "result" / Bytes(this.length) * "opcode result",
    "tag" / Bytes(AUTH_TAG_BYTES) * "truncated HMAC-SHA-256 over every field that affects processing",
)
"""A terminal's answer to a command, authenticated."""

SEALED_MESSAGE = Struct(
    "body" / Body(GreedyBytes, MESSAGE_CRC_BYTES) * "application payload",
    "crc" / Checksum(Int32ub, crc32c, this.body) * "CRC-32C of the payload",
)
"""An application message as fragmented: payload then CRC-32C.  Reassembly
is complete only when this CRC verifies."""
