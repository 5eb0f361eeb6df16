"""The frame types: one entry per :class:`FrameType`, everything known about it.

Each :class:`FrameKind` names a frame type's representation class, its
construct declaration, the conversions between the two, its hand-written
codec if it has one, and how the documents describe it.  The codec dispatches
through the views built here (by head byte, by representation class); the
generated documents and the command line read the same entries.  Adding a
frame type means adding a declaration, a representation and one entry below.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Mapping
from typing import Any

from construct import Container, Struct
from ionotrail.terminal.errors import UsageError
from ionotrail.terminal.wire import fastpath, formats, layout, values
from ionotrail.terminal.wire.formats import FrameType
from ionotrail.terminal.wire.frames import Ack, AuthFragment, Command, Fragment, Frame, Probe, Reply


@dataclasses.dataclass(frozen=True, slots=True)
class FrameKind:
    """Everything the stack knows about one frame type."""

    frame_type: FrameType
    representation: type[Frame]
    """The frozen, always-valid class (``frames.py``)."""
    declaration: Struct
    """The construct declaration (``formats.py``): the single source of its layout."""
    to_fields: Callable[[Any], values.FieldValues]
    """Representation to the declaration's value (without the head)."""
    from_fields: Callable[[Container], Frame]
    """The declaration's parsed value to a representation (the constructor checks it)."""
    direction: str
    """Who sends it, for the documents."""
    purpose: str
    """What it is for, for the documents."""
    fast_encode: Callable[[Any], bytes] | None = None
    """Hand-written encoder (``fastpath.py``), byte-identical to the declaration."""
    fast_decode: Callable[[bytes], Frame] | None = None
    """Hand-written decoder for bytes that start with :attr:`head`."""

    @property
    def name(self) -> str:
        """The frame type as the documents, the command line and benchmarks name it."""
        return self.frame_type.name.lower()

    @property
    def head(self) -> int:
        """First byte of every frame of this type in this format version."""
        return layout.head_byte(self.frame_type)


FRAME_KINDS: Mapping[FrameType, FrameKind] = {
    kind.frame_type: kind
    for kind in (
        FrameKind(
            FrameType.PROBE,
            Probe,
            formats.PROBE,
            values.probe_fields,
            values.probe_from_fields,
            direction="master to all",
            purpose="beacon; poll, acknowledgement and command ride on it",
            fast_encode=fastpath.encode_probe,
            fast_decode=fastpath.decode_probe,
        ),
        FrameKind(
            FrameType.FRAGMENT,
            Fragment,
            formats.FRAGMENT,
            values.fragment_fields,
            values.fragment_from_fields,
            direction="either",
            purpose="a byte range of a sealed message",
            fast_encode=fastpath.encode_fragment,
            fast_decode=fastpath.decode_fragment,
        ),
        FrameKind(
            FrameType.ACK,
            Ack,
            formats.ACK,
            values.ack_fields,
            values.ack_from_fields,
            direction="either",
            purpose="selective acknowledgement of one message",
            fast_encode=fastpath.encode_ack,
            fast_decode=fastpath.decode_ack,
        ),
        FrameKind(
            FrameType.COMMAND,
            Command,
            formats.COMMAND,
            values.command_fields,
            values.command_from_fields,
            direction="master to terminal",
            purpose="a downlink command on its own",
        ),
        FrameKind(
            FrameType.REPLY,
            Reply,
            formats.REPLY,
            values.reply_fields,
            values.reply_from_fields,
            direction="terminal to master",
            purpose="the answer to a command",
        ),
        FrameKind(
            FrameType.TAGGED,
            AuthFragment,
            formats.TAGGED,
            values.tagged_fields,
            values.tagged_from_fields,
            direction="either (uplink in this stack)",
            purpose="a fragment with key epoch, counter and tag (optional data authentication)",
        ),
    )
}
"""Frame type to everything known about it, in type order."""


def _check() -> None:
    """Every type has one entry, each entry agrees with its own parts."""
    if set(FRAME_KINDS) != set(FrameType):
        raise layout.StaleLayout(f"frame types without an entry: {sorted(set(FrameType) - set(FRAME_KINDS))}")
    for frame_type, kind in FRAME_KINDS.items():
        if kind.frame_type is not frame_type or kind.representation.frame_type is not frame_type:
            raise layout.StaleLayout(f"{kind.name}: its representation says {kind.representation.frame_type.name}")
        if (kind.fast_encode is None) != (kind.fast_decode is None):
            raise layout.StaleLayout(f"{kind.name}: a hand-written codec must both encode and decode")
        layout.frame_fields(kind.declaration)  # the CRC envelope every frame has
        if layout.trailer_bytes(kind.declaration) != layout.trailer_bytes(formats.FRAGMENT):
            raise layout.StaleLayout(f"{kind.name}: every frame ends in the same CRC")
    if fastpath.HEAD_BYTE != FRAME_KINDS[FrameType.FRAGMENT].head:
        raise layout.StaleLayout("the fragment fast path dispatches on another head byte")


_check()

BY_HEAD: Mapping[int, FrameKind] = {kind.head: kind for kind in FRAME_KINDS.values()}
"""First byte (this format version) to frame kind."""

BY_REPRESENTATION: Mapping[type, FrameKind] = {kind.representation: kind for kind in FRAME_KINDS.values()}
"""Representation class to frame kind."""

FAST_DECODERS: Mapping[int, Callable[[bytes], Frame]] = {
    head: kind.fast_decode for head, kind in BY_HEAD.items() if kind.fast_decode is not None
}
"""First byte to hand-written decoder, for the types that have one."""

FAST_ENCODERS: Mapping[type, Callable[[Any], bytes]] = {
    cls: kind.fast_encode for cls, kind in BY_REPRESENTATION.items() if kind.fast_encode is not None
}
"""Representation class to hand-written encoder, for the types that have one."""

FRAME_FORMATS: Mapping[FrameType, Struct] = {frame_type: kind.declaration for frame_type, kind in FRAME_KINDS.items()}
"""Frame type to declaration (a view of :data:`FRAME_KINDS`, kept for callers of the older name)."""


def kind_of(frame: object) -> FrameKind:
    """The entry for a frame representation; :class:`UsageError` for anything else."""
    kind = BY_REPRESENTATION.get(type(frame))
    if kind is None:
        raise UsageError(f"{type(frame).__name__} is not a frame representation")
    return kind


__all__ = [
    "BY_HEAD",
    "BY_REPRESENTATION",
    "FAST_DECODERS",
    "FAST_ENCODERS",
    "FRAME_FORMATS",
    "FRAME_KINDS",
    "FrameKind",
    "kind_of",
]
