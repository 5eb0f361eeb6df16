"""Over-the-air formats: declarations, representations and codecs."""

from ionotrail.terminal.wire.codec import decode, encode, seal_message, unseal_message
from ionotrail.terminal.wire.formats import FrameType, ReplyStatus
from ionotrail.terminal.wire.frames import (
    Ack,
    AckBlock,
    AuthFragment,
    Command,
    CommandBlock,
    Fragment,
    Frame,
    Probe,
    Reply,
)
from ionotrail.terminal.wire.layout import IDLE_PROBE_BYTES
from ionotrail.terminal.wire.registry import FRAME_KINDS, FrameKind, kind_of

__all__ = [
    "FRAME_KINDS",
    "IDLE_PROBE_BYTES",
    "Ack",
    "AckBlock",
    "AuthFragment",
    "Command",
    "CommandBlock",
    "Fragment",
    "Frame",
    "FrameKind",
    "FrameType",
    "Probe",
    "Reply",
    "ReplyStatus",
    "decode",
    "encode",
    "kind_of",
    "seal_message",
    "unseal_message",
]
