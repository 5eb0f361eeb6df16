"""Byte offsets, sizes and bit positions read from the declarations.

The hand-written codecs (:mod:`~ionotrail.terminal.wire.fastpath`) and the
frames' wire lengths take their layouts from here instead of restating them:
struct formats, bit masks and fixed sizes are computed from the construct
declarations in :mod:`~ionotrail.terminal.wire.formats` when the module is
imported.  What a hand-written codec assumes but cannot derive (field order,
an offset in the low bits, a sized limit in ``terminal/limits.py``) is checked
at the same time, and a mismatch raises :class:`StaleLayout`: a changed
declaration cannot leave a fast path silently stale.
"""

from __future__ import annotations

import dataclasses
import struct
from collections.abc import Iterable, Sequence

import construct as cs
from ionotrail.terminal import limits
from ionotrail.terminal.wire import formats
from ionotrail.terminal.wire.formats import FrameType


class StaleLayout(Exception):
    """Code that restates a layout no longer matches its declaration.

    Raised at import, so a changed format stops the stack from loading rather
    than letting a hand-written codec send or accept the old layout."""


@dataclasses.dataclass(frozen=True, slots=True)
class Bits:
    """One member of a bit structure, placed in the integer the structure packs into."""

    shift: int
    """Position of the member's least significant bit (0: the lowest bit)."""

    width: int
    """Number of bits."""

    @property
    def mask(self) -> int:
        """The member's bits, in place."""
        return ((1 << self.width) - 1) << self.shift


def _unwrap(con: cs.Construct) -> cs.Construct:
    """Strip naming layers (``"name" / sub * "docs"``)."""
    while isinstance(con, cs.Renamed):
        con = con.subcon
    return con


def names(declaration: cs.Struct) -> tuple[str, ...]:
    """Field names of a structure, in wire order."""
    return tuple(sub.name for sub in declaration.subcons)


def expect_names(declaration: cs.Struct, expected: Sequence[str], what: str) -> None:
    """Raise :class:`StaleLayout` unless the structure's fields are exactly ``expected``, in order."""
    found = names(declaration)
    if found != tuple(expected):
        raise StaleLayout(f"{what}: the declaration has fields {found}, the code expects {tuple(expected)}")


def member(declaration: cs.Struct, name: str) -> cs.Construct:
    """The construct of field ``name``, naming layers stripped."""
    for sub in declaration.subcons:
        if sub.name == name:
            return _unwrap(sub)
    raise StaleLayout(f"the declaration has no field {name!r} (fields: {names(declaration)})")


def optional(declaration: cs.Struct, name: str) -> cs.Construct:
    """The construct of an optional field (``If(flag, sub)``) when present."""
    con = member(declaration, name)
    if not isinstance(con, cs.IfThenElse):
        raise StaleLayout(f"field {name!r} is no longer optional")
    return _unwrap(con.thensubcon)


def element(declaration: cs.Struct, name: str) -> cs.Construct:
    """The element construct of an array field."""
    con = member(declaration, name)
    if not isinstance(con, cs.Array):
        raise StaleLayout(f"field {name!r} is no longer an array")
    return _unwrap(con.subcon)


def size(con: cs.Construct, what: str = "field") -> int:
    """Fixed size of a construct (bytes, or bits inside a bit structure)."""
    try:
        return int(con.sizeof())
    except cs.SizeofError:
        raise StaleLayout(f"{what} has no fixed size") from None


def frame_fields(frame: cs.Struct) -> cs.Struct:
    """The structure of a frame's fields, inside its CRC envelope."""
    expect_names(frame, ("fields", "crc"), "frame envelope")
    raw = member(frame, "fields")
    body = raw.subcon if isinstance(raw, cs.RawCopy) else None
    if not isinstance(body, formats.Body) or not isinstance(body.subcon, cs.Struct):
        raise StaleLayout("a frame's fields are no longer a Body(Struct) inside RawCopy")
    return body.subcon


def trailer_bytes(frame: cs.Struct) -> int:
    """Bytes of a frame's CRC trailer."""
    crc = member(frame, "crc")
    if not isinstance(crc, cs.Checksum):
        raise StaleLayout("a frame's trailer is no longer a checksum")
    return size(crc.checksumfield, "the CRC")


def fixed_bytes(declaration: cs.Struct, variable: Iterable[str] = ()) -> int:
    """Bytes of every field but the ``variable`` ones, which must exist."""
    skip = set(variable)
    missing = skip - set(names(declaration))
    if missing:
        raise StaleLayout(f"the declaration has no fields {sorted(missing)}")
    return sum(size(_unwrap(sub), repr(sub.name)) for sub in declaration.subcons if sub.name not in skip)


def frame_bytes(frame: cs.Struct, variable: Iterable[str] = ()) -> int:
    """Bytes of a frame with every ``variable`` field empty or absent: fixed fields plus CRC."""
    return fixed_bytes(frame_fields(frame), variable) + trailer_bytes(frame)


_CODES = {1: "B", 2: "H", 4: "I"}


def _code(con: cs.Construct, name: str) -> str:
    """A :mod:`struct` code for one fixed-size field read as a whole."""
    if isinstance(con, cs.FormatField):
        if con.fmtstr[0] != ">":
            raise StaleLayout(f"field {name!r} is no longer big-endian")
        return str(con.fmtstr[1:])
    if isinstance(con, (cs.Const, cs.Rebuild)):
        return _code(_unwrap(con.subcon), name)
    if _is_bits(con):
        count = size(con, repr(name))
        if count not in _CODES:
            raise StaleLayout(f"bit field {name!r} is {count} bytes; read as a whole it must be 1, 2 or 4")
        return _CODES[count]
    raise StaleLayout(f"field {name!r} ({type(con).__name__}) is not a fixed-size integer or bit field")


def packer(declaration: cs.Struct, leading: Sequence[str], what: str) -> struct.Struct:
    """A big-endian :class:`struct.Struct` for the first fields of a declaration.

    ``leading`` names them in the order the calling code unpacks them; they
    must be the declaration's first fields in that order."""
    found = names(declaration)[: len(leading)]
    if found != tuple(leading):
        raise StaleLayout(f"{what}: the declaration starts with {found}, the code unpacks {tuple(leading)}")
    return struct.Struct(">" + "".join(_code(member(declaration, name), name) for name in leading))


def single(con: cs.Construct, what: str) -> struct.Struct:
    """A big-endian :class:`struct.Struct` for one fixed-size field."""
    return struct.Struct(">" + _code(con, what))


def _is_bits(con: cs.Construct) -> bool:
    return isinstance(con, cs.Transformed) and isinstance(con.subcon, cs.Struct)


def bits(declaration: cs.Struct, name: str, expected: Iterable[str] | None = None) -> dict[str, Bits]:
    """Members of the bit structure field ``name``, placed in the integer it
    packs into (most significant bit first on the wire, as construct's
    BitStruct has it).  With ``expected``, the members must be exactly those
    (in any order): the ones the calling code reads."""
    placed = bit_members(member(declaration, name), repr(name))
    if expected is not None and set(placed) != set(expected):
        raise StaleLayout(f"{name}: the declaration has bits {sorted(placed)}, the code reads {sorted(expected)}")
    return placed


def bit_members(con: cs.Construct, what: str) -> dict[str, Bits]:
    """Members of a bit structure, placed in the integer it packs into."""
    con = _unwrap(con)
    if not _is_bits(con):
        raise StaleLayout(f"{what} is no longer a bit structure")
    widths = [(sub.name, size(_unwrap(sub), f"bit {sub.name!r}")) for sub in con.subcon.subcons]
    left = sum(width for _, width in widths)
    placed: dict[str, Bits] = {}
    for member_name, width in widths:
        left -= width
        placed[member_name] = Bits(left, width)
    return placed


def head_byte(frame_type: FrameType) -> int:
    """First byte of every frame of ``frame_type`` in this format version, built by the declaration."""
    head = bytes(formats.HEAD.build({"version": limits.FORMAT_VERSION, "type": int(frame_type)}))
    if len(head) != 1:
        raise StaleLayout(f"the head is {len(head)} bytes; the codecs dispatch on one")
    return head[0]


# --- sizes read from the declarations -----------------------------------------------

IDLE_PROBE_BYTES = frame_bytes(formats.PROBE, ("poll", "ack", "command"))
"""A probe with no poll, acknowledgement or command: head, master, sequence,
flags and CRC (7 bytes), the least a master sends to keep a trail's opening
known.  The channel's audibility check sizes its probes by this."""


def check_limits() -> None:
    """Sizes stated in ``terminal/limits.py`` (which cannot import the
    declarations it bounds) agree with the declarations."""
    count = bits(formats.ACK_BLOCK, "status")["count"]
    stated = {
        "FRAGMENT_HEADER_BYTES": (limits.FRAGMENT_HEADER_BYTES, fixed_bytes(frame_fields(formats.FRAGMENT), ("payload",))),
        "FRAGMENT_OVERHEAD_BYTES": (limits.FRAGMENT_OVERHEAD_BYTES, frame_bytes(formats.FRAGMENT, ("payload",))),
        "FRAME_CRC_BYTES": (limits.FRAME_CRC_BYTES, trailer_bytes(formats.FRAGMENT)),
        "MIN_FRAME_BYTES": (limits.MIN_FRAME_BYTES, size(formats.HEAD) + trailer_bytes(formats.FRAGMENT)),
        "MAX_ACK_RANGES": (limits.MAX_ACK_RANGES, (1 << count.width) - 1),
        "MESSAGE_CRC_BYTES": (limits.MESSAGE_CRC_BYTES, size(member(formats.SEALED_MESSAGE, "crc").checksumfield)),
        "AUTH_TAG_BYTES": (limits.AUTH_TAG_BYTES, size(member(frame_fields(formats.TAGGED), "tag"))),
        # what authenticating a fragment adds on the air: epoch, counter and tag (docs/keys.md)
        "AUTH_EPOCH_BITS + AUTH_COUNTER_BITS + AUTH_TAG_BYTES": (
            limits.AUTH_EPOCH_BITS // 8 + limits.AUTH_COUNTER_BITS // 8 + limits.AUTH_TAG_BYTES,
            frame_bytes(formats.TAGGED, ("payload",)) - frame_bytes(formats.FRAGMENT, ("payload",)),
        ),
    }
    for name, (value, declared) in stated.items():
        if value != declared:
            raise StaleLayout(f"terminal/limits.py states {name} = {value}; the declarations give {declared}")


check_limits()
