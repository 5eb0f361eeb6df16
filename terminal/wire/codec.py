"""Encode frame representations to bytes and decode untrusted bytes to them.

:func:`decode` is the only entry point for received frames.  Its checks run
in a fixed order: size bounds (before anything is copied), CRC, version,
type, fields, semantic rules.  Whatever the input, it returns a valid frame
or raises a :class:`~ionotrail.terminal.errors.DecodeError` subclass.
"""

from __future__ import annotations

from construct import ChecksumError, ConstructError, StreamError
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
from ionotrail.terminal.wire import fastpath, formats
from ionotrail.terminal.wire.crc import crc32c
from ionotrail.terminal.wire.formats import FrameType, LeftoverBytes
from ionotrail.terminal.wire.frames import Frame
from ionotrail.terminal.wire.layout import bit_members
from ionotrail.terminal.wire.registry import BY_REPRESENTATION, FAST_DECODERS, FAST_ENCODERS, FRAME_KINDS


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

_HEAD = bit_members(formats.HEAD, "the head")
_VERSION, _TYPE = _HEAD["version"], _HEAD["type"]

_fast_decoder = FAST_DECODERS.get


def decode(data: bytes | bytearray | memoryview) -> Frame:
    """Decode one received frame (its length delimited by the link layer)."""
    raw = data if type(data) is bytes else _as_bytes(data)
    fast = _fast_decoder(raw[0]) if raw else None
    return fast(raw) if fast is not None else decode_with_construct(raw)


def decode_with_construct(data: bytes | bytearray | memoryview) -> Frame:
    """Decode any frame through its construct declaration (the reference path)."""
    raw = _as_bytes(data)
    size = fastpath.check_envelope(raw)  # size bounds, then CRC
    version = (raw[0] & _VERSION.mask) >> _VERSION.shift
    type_code = (raw[0] & _TYPE.mask) >> _TYPE.shift
    if version != FORMAT_VERSION:
        raise UnsupportedVersion(f"format version {version}; this decoder reads version {FORMAT_VERSION}")
    try:
        kind = FRAME_KINDS[FrameType(type_code)]
    except ValueError:
        raise UnknownFrameType(f"frame type {type_code} is not assigned in format version {version}") from None
    name = kind.name
    try:
        parsed = kind.declaration.parse(raw).fields.value
    except StreamError:
        raise TruncatedFrame(f"{name} frame of {size} bytes ends inside a field") from None
    except LeftoverBytes as exc:
        raise BadLength(f"{name} frame: {_explain(exc)}") from None
    except ChecksumError:  # checked above; kept so the mapping is total
        raise CrcMismatch("frame CRC-16 does not match: corrupted on the air or misframed") from None
    except ConstructError as exc:
        raise BadField(f"{name} frame: {_explain(exc)}") from None
    try:
        return kind.from_fields(parsed)
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


# --- encoding -------------------------------------------------------------------

_fast_encoder = FAST_ENCODERS.get


def encode(frame: Frame) -> bytes:
    """Bytes on the air for a frame representation."""
    fast = _fast_encoder(type(frame))
    return fast(frame) if fast is not None else encode_with_construct(frame)


def encode_with_construct(frame: Frame) -> bytes:
    """Encode any frame through its construct declaration (the reference path)."""
    kind = BY_REPRESENTATION.get(type(frame))
    if kind is None:
        raise UsageError(f"cannot encode {type(frame).__name__}: not a frame representation")
    value = kind.to_fields(frame)
    value["head"] = {"version": FORMAT_VERSION, "type": int(kind.frame_type)}
    return bytes(kind.declaration.build({"fields": {"value": value}}))


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
