"""Over-the-air formats: declarations, representations and codecs."""

from ionotrail.terminal.wire.codec import decode, encode, seal_message, unseal_message
from ionotrail.terminal.wire.formats import FrameType, ReplyStatus
from ionotrail.terminal.wire.frames import Ack, AckBlock, Command, CommandBlock, Fragment, Frame, Probe, Reply

__all__ = [
    "Ack",
    "AckBlock",
    "Command",
    "CommandBlock",
    "Fragment",
    "Frame",
    "FrameType",
    "Probe",
    "Reply",
    "ReplyStatus",
    "decode",
    "encode",
    "seal_message",
    "unseal_message",
]
