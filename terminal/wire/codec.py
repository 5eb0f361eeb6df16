"""Encode frame representations to bytes and decode untrusted bytes to them.

:func:`decode` is the only entry point for received frames.  Its checks run
in a fixed order: size bounds (before anything is copied), CRC, version,
type, fields, semantic rules.  Whatever the input, it returns a valid frame
or raises a :class:`~ionotrail.terminal.errors.DecodeError` subclass.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from construct import ChecksumError, ConstructError, Container, StreamError
from ionotrail.terminal.errors import (
    BadField,
    BadLength,
    CrcMismatch,
    DecodeError,
    FrameTooLong,
    MessageCrcMismatch,
    TruncatedFrame,
    UnknownFrameType,
    UnsupportedVersion,
    UsageError,
)
from ionotrail.terminal.limits import (
    FORMAT_VERSION,
    MAX_FRAME_BYTES,
    MAX_MESSAGE_STREAM,
    MESSAGE_CRC_BYTES,
)
from ionotrail.terminal.wire import fastpath
from ionotrail.terminal.wire.crc import crc32c
from ionotrail.terminal.wire.formats import FRAME_FORMATS, FrameType, LeftoverBytes
from ionotrail.terminal.wire.frames import Ack, AckBlock, Command, CommandBlock, Fragment, Frame, Probe, Reply

_FRAME_CLASSES: dict[FrameType, type] = {
    FrameType.PROBE: Probe,
    FrameType.FRAGMENT: Fragment,
    FrameType.ACK: Ack,
    FrameType.COMMAND: Command,
    FrameType.REPLY: Reply,
}


def _as_bytes(data: object) -> bytes:
    if isinstance(data, bytes):
        return data
    if isinstance(data, (bytearray, memoryview)):
        size = data.nbytes if isinstance(data, memoryview) else len(data)  # bytes, whatever the item size
        if size > MAX_FRAME_BYTES:  # refuse before copying
            raise FrameTooLong(f"frame of {size} bytes exceeds the {MAX_FRAME_BYTES}-byte maximum")
        return bytes(data)
    raise UsageError(f"frames are decoded from bytes, not {type(data).__name__}")


# --- decoding -------------------------------------------------------------------


def decode(data: bytes | bytearray | memoryview) -> Frame:
    """Decode one received frame (its length delimited by the link layer)."""
    raw = data if type(data) is bytes else _as_bytes(data)
    fast = _FAST_DECODERS.get(raw[0]) if raw else None
    return fast(raw) if fast is not None else decode_with_construct(raw)


_FAST_DECODERS: dict[int, Callable[[bytes], Frame]] = {
    fastpath.HEAD_BYTE: fastpath.decode_fragment,
    fastpath.PROBE_HEAD: fastpath.decode_probe,
    fastpath.ACK_HEAD: fastpath.decode_ack,
}
_FAST_ENCODERS: dict[type, Callable[[Any], bytes]] = {
    Fragment: fastpath.encode_fragment,
    Probe: fastpath.encode_probe,
    Ack: fastpath.encode_ack,
}


def decode_with_construct(data: bytes | bytearray | memoryview) -> Frame:
    """Decode any frame through its construct declaration (the reference path)."""
    raw = _as_bytes(data)
    size = fastpath.check_envelope(raw)  # size bounds, then CRC
    version, type_code = raw[0] >> 4, raw[0] & 0x0F
    if version != FORMAT_VERSION:
        raise UnsupportedVersion(f"format version {version}; this decoder reads version {FORMAT_VERSION}")
    try:
        frame_type = FrameType(type_code)
    except ValueError:
        raise UnknownFrameType(f"frame type {type_code} is not assigned in format version {version}") from None
    name = frame_type.name.lower()
    try:
        parsed = FRAME_FORMATS[frame_type].parse(raw).fields.value
    except StreamError:
        raise TruncatedFrame(f"{name} frame of {size} bytes ends inside a field") from None
    except LeftoverBytes as exc:
        raise BadLength(f"{name} frame: {_explain(exc)}") from None
    except ChecksumError:  # checked above; kept so the mapping is total
        raise CrcMismatch("frame CRC-16 does not match: corrupted on the air or misframed") from None
    except ConstructError as exc:
        raise BadField(f"{name} frame: {_explain(exc)}") from None
    try:
        return _CONVERTERS[frame_type](parsed)
    except UsageError as exc:
        raise BadField(f"{name} frame: {exc}") from None


def _explain(exc: ConstructError) -> str:
    """construct's message with its path as a dotted field name."""
    lines = str(exc).splitlines()
    message = lines[-1] if lines else type(exc).__name__
    steps: list[str] = []
    for step in (getattr(exc, "path", None) or "").split(" -> "):
        step = step.strip()
        if step and not step.startswith("(") and step not in ("fields", "value") and (not steps or steps[-1] != step):
            steps.append(step)
    return f"{'.'.join(steps)}: {message}" if steps else message


def _ack_block(c: Container) -> AckBlock:
    return AckBlock(
        c.terminal,
        c.message_id,
        tuple((r.start, r.end) for r in c.ranges),
        c.status.complete,
        c.status.downlink,
        c.status.refused,
    )


def _command_block(c: Container) -> CommandBlock:
    return CommandBlock(c.command_id, c.opcode, c.arguments)


def _probe(c: Container) -> Probe:
    ack = None if c.ack is None else _ack_block(c.ack)
    command = None if c.command is None else _command_block(c.command)
    return Probe(c.master, c.sequence, c.poll, ack, command)


_CONVERTERS: dict[FrameType, Callable[[Container], Frame]] = {
    FrameType.PROBE: _probe,
    FrameType.FRAGMENT: lambda c: Fragment(
        c.terminal, c.master, c.message_id, c.position.offset, c.payload, c.position.final, c.position.urgent, c.position.downlink
    ),
    FrameType.ACK: lambda c: Ack(c.master, _ack_block(c.ack)),
    FrameType.COMMAND: lambda c: Command(c.master, c.terminal, _command_block(c.command)),
    FrameType.REPLY: lambda c: Reply(c.terminal, c.master, c.command_id, c.status, c.result),
}


# --- encoding -------------------------------------------------------------------


def encode(frame: Frame) -> bytes:
    """Bytes on the air for a frame representation."""
    fast = _FAST_ENCODERS.get(type(frame))
    return fast(frame) if fast is not None else encode_with_construct(frame)


def encode_with_construct(frame: Frame) -> bytes:
    """Encode any frame through its construct declaration (the reference path)."""
    frame_type = getattr(frame, "frame_type", None)
    if type(frame) is not _FRAME_CLASSES.get(frame_type):  # type: ignore[arg-type]
        raise UsageError(f"cannot encode {type(frame).__name__}: not a frame representation")
    value = _FIELD_VALUES[frame_type](frame)  # type: ignore[index]
    value["head"] = {"version": FORMAT_VERSION, "type": int(frame_type)}  # type: ignore[arg-type]
    return FRAME_FORMATS[frame_type].build({"fields": {"value": value}})  # type: ignore[index,no-any-return]


def _ack_value(block: AckBlock) -> dict[str, Any]:
    return {
        "terminal": block.terminal,
        "message_id": block.message_id,
        "status": {"complete": block.complete, "downlink": block.downlink, "refused": block.refused},
        "ranges": [{"start": s, "end": e} for s, e in block.ranges],
    }


def _command_value(block: CommandBlock) -> dict[str, Any]:
    return {"command_id": block.command_id, "opcode": block.opcode, "arguments": block.arguments}


def _probe_value(p: Probe) -> dict[str, Any]:
    return {
        "master": p.master,
        "sequence": p.sequence,
        "flags": {"poll": p.poll is not None, "ack": p.ack is not None, "command": p.command is not None},
        "poll": p.poll,
        "ack": None if p.ack is None else _ack_value(p.ack),
        "command": None if p.command is None else _command_value(p.command),
    }


def _fragment_value(f: Fragment) -> dict[str, Any]:
    return {
        "terminal": f.terminal,
        "master": f.master,
        "message_id": f.message_id,
        "position": {"final": f.final, "urgent": f.urgent, "downlink": f.downlink, "offset": f.offset},
        "payload": f.payload,
    }


_FIELD_VALUES: dict[FrameType, Callable[[Any], dict[str, Any]]] = {
    FrameType.PROBE: _probe_value,
    FrameType.FRAGMENT: _fragment_value,
    FrameType.ACK: lambda a: {"master": a.master, "ack": _ack_value(a.ack)},
    FrameType.COMMAND: lambda c: {"master": c.master, "terminal": c.terminal, "command": _command_value(c.command)},
    FrameType.REPLY: lambda r: {
        "terminal": r.terminal,
        "master": r.master,
        "command_id": r.command_id,
        "status": int(r.status),
        "result": r.result,
    },
}


# --- sealed messages ------------------------------------------------------------


def seal_message(payload: bytes) -> bytes:
    """Payload followed by its CRC-32C: the byte stream that is fragmented."""
    if len(payload) + MESSAGE_CRC_BYTES > MAX_MESSAGE_STREAM:
        raise UsageError(f"message of {len(payload)} bytes exceeds the {MAX_MESSAGE_STREAM - MESSAGE_CRC_BYTES}-byte format limit")
    return bytes(payload) + crc32c(payload).to_bytes(MESSAGE_CRC_BYTES, "big")


def unseal_message(sealed: bytes) -> bytes:
    """The payload of a reassembled message, once its CRC-32C verifies."""
    if len(sealed) < MESSAGE_CRC_BYTES:
        raise TruncatedFrame(f"sealed message of {len(sealed)} bytes is shorter than its CRC-32C")
    payload = sealed[:-MESSAGE_CRC_BYTES]
    if crc32c(payload) != int.from_bytes(sealed[-MESSAGE_CRC_BYTES:], "big"):
        raise MessageCrcMismatch("reassembled message fails its CRC-32C: a fragment was wrong")
    return bytes(payload)


__all__ = [
    "DecodeError",
    "decode",
    "decode_with_construct",
    "encode",
    "encode_with_construct",
    "seal_message",
    "unseal_message",
]
