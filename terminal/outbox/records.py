"""Declarations of the records the core asks a store to keep: the single source of truth.

Every record starts with a version byte.  Records are read back from a file a
power cut may have interrupted or another program may have written, so they
are decoded like anything received: only :class:`~ionotrail.terminal.errors.DecodeError`
escapes, with a message naming the record.  ``ionotrail docs`` draws the
tables in docs/outbox.md from these declarations.
"""

from __future__ import annotations

from typing import Any

from construct import (
    Const,
    Construct,
    ConstructError,
    Flag,
    Float64b,
    GreedyBytes,
    Int8ub,
    Int16ub,
    Int64ub,
    Prefixed,
    PrefixedArray,
    Struct,
)
from ionotrail.terminal.errors import BadField
from ionotrail.terminal.limits import STORE_RECORD_VERSION

VERSION = "version" / Const(STORE_RECORD_VERSION, Int8ub) * "record format version (this document: 1)"

RANGE = Struct(
    "start" / Int16ub * "first byte of the range",
    "end" / Int16ub * "one past its last byte",
)

COUNTER = Struct(
    VERSION,
    "ceiling" / Int64ub * "ids below this may have been used; after a reboot the next id is this",
)
"""The terminal's message-id counter (key ``counter/message-id``)."""

MESSAGE = Struct(
    VERSION,
    "seq" / Int64ub * "message id, unwrapped (the wire carries its low 16 bits)",
    "urgent" / Flag * "alarm priority (else routine)",
    "created" / Float64b * "when it was queued, on the terminal's clock of that boot",
    "acked" / PrefixedArray(Int8ub, RANGE) * "byte ranges of the sealed message the master acknowledged",
    "sealed" / GreedyBytes * "the sealed message: payload and CRC-32C",
)
"""A message accepted into the terminal's outbox (key ``message/<id>``)."""

WINDOW = Struct(
    VERSION,
    "downlink" / Flag * "the stream's direction",
    "terminal" / Int16ub * "terminal address",
    "master" / Int8ub * "master-station id",
    "top" / Int64ub * "highest completed message id, unwrapped",
    "bitmap" / GreedyBytes * "completed ids behind it, bit k = top - k, big-endian",
)
"""A completed-id window of the master's reassembler (key ``window/<d>/<terminal>/<master>``)."""

PARTIAL = Struct(
    VERSION,
    "downlink" / Flag * "the stream's direction",
    "terminal" / Int16ub * "terminal address",
    "master" / Int8ub * "master-station id",
    "message_id" / Int16ub * "message id as on the wire",
    "urgent" / Flag * "alarm priority",
    "has_end" / Flag * "the final fragment arrived",
    "end" / Int16ub * "sealed length (when has_end)",
    "chunks"
    / PrefixedArray(Int8ub, Struct("start" / Int16ub, "data" / Prefixed(Int16ub, GreedyBytes)))
    * "held ranges and their bytes",
)
"""A half-built message at the master (key ``partial/<d>/<terminal>/<master>/<id>``)."""

DELIVERY = Struct(
    VERSION,
    "terminal" / Int16ub * "terminal address",
    "message_id" / Int16ub * "message id as on the wire",
    "urgent" / Flag * "alarm priority",
    "completed" / Float64b * "when it completed, on the master's clock of that boot",
    "payload" / GreedyBytes * "the delivered payload",
)
"""A delivered message, appended to the master's log in the commit that
records its id as completed."""

COMMANDS = Struct(
    VERSION,
    "has_top" / Flag * "a command has run",
    "top" / Int8ub * "the highest command id run (the window's right edge)",
    "seen" / Prefixed(Int8ub, GreedyBytes) * "ids run behind it, bit k = top - k, big-endian",
    "replies"
    / PrefixedArray(
        Int16ub,
        Struct(
            "command_id" / Int8ub,
            "answered" / Flag,
            "frame" / Prefixed(Int16ub, GreedyBytes),
        ),
    )
    * "the newest commands run, with their signed reply frames when made",
)
"""The terminal's memory of commands run (key ``commands/memory``)."""

NEXT_COMMAND_ID = Struct(
    VERSION,
    "terminal" / Int16ub * "terminal address",
    "next" / Int8ub * "the command id the master gives this terminal's next command",
)
"""The master's next command id for one terminal (key ``commands/next-id/<terminal>``):
a restarted master goes on from it, so a new command never takes the id of
one the terminal already ran."""

DECLARATIONS: dict[str, Construct] = {
    "counter": COUNTER,
    "message": MESSAGE,
    "window": WINDOW,
    "partial": PARTIAL,
    "delivery": DELIVERY,
    "commands": COMMANDS,
    "next-command-id": NEXT_COMMAND_ID,
}


def parse(declaration: Construct, name: str, data: bytes) -> Any:
    """Decode record ``name``; anything wrong is a :class:`BadField` naming it."""
    if not isinstance(data, bytes):
        raise BadField(f"record {name}: stored value is {type(data).__name__}, not bytes")
    try:
        return declaration.parse(data)
    except ConstructError as exc:
        raise BadField(
            f"record {name}: {exc.__class__.__name__}: {str(exc).splitlines()[0] if str(exc) else 'malformed'}"
        ) from None
