"""The two error families of the stack.

Anything that arrives from the air or the serial line can only ever raise
:class:`DecodeError` (or a subclass); every instance carries a machine-readable
``reason`` and a message a person can act on.  Misuse by the calling program
(a field out of range, a frame too large to send) raises :class:`UsageError`.
Keeping the families apart is what lets a fuzz test assert "received bytes
never raise anything else".
"""

from __future__ import annotations

import enum


class Reason(enum.Enum):
    """Why received bytes were refused; stable names for counters and reports."""

    TRUNCATED = "truncated"
    TOO_LONG = "too_long"
    BAD_CRC = "bad_crc"
    UNSUPPORTED_VERSION = "unsupported_version"
    UNKNOWN_TYPE = "unknown_type"
    BAD_LENGTH = "bad_length"
    BAD_FIELD = "bad_field"
    BAD_MESSAGE_CRC = "bad_message_crc"
    BAD_LINE_CODE = "bad_line_code"
    NO_TRANSITION = "no_transition"


class DecodeError(Exception):
    """Received bytes that do not form a valid frame or message."""

    reason: Reason = Reason.BAD_FIELD

    def __init__(self, message: str) -> None:
        super().__init__(message)
        self.message = message


class TruncatedFrame(DecodeError):
    reason = Reason.TRUNCATED


class FrameTooLong(DecodeError):
    reason = Reason.TOO_LONG


class CrcMismatch(DecodeError):
    reason = Reason.BAD_CRC


class UnsupportedVersion(DecodeError):
    reason = Reason.UNSUPPORTED_VERSION


class UnknownFrameType(DecodeError):
    reason = Reason.UNKNOWN_TYPE


class BadLength(DecodeError):
    reason = Reason.BAD_LENGTH


class BadField(DecodeError):
    reason = Reason.BAD_FIELD


class MessageCrcMismatch(DecodeError):
    reason = Reason.BAD_MESSAGE_CRC


class BadLineCode(DecodeError):
    reason = Reason.BAD_LINE_CODE


class ProtocolError(DecodeError):
    """What was received drove a state machine to a (state, input) pair its
    transition table does not allow."""

    reason = Reason.NO_TRANSITION


class UsageError(ValueError):
    """The calling program asked for something the protocol cannot express."""
