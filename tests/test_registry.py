"""The frame-type registry and the sizes read from the declarations.

Expected values come from docs/wire.md's hand-written rules (head: version in
the high nibble, type in the low; the type values; which frames have a fast
path, from DEVELOPERS.md), never from the registry itself.
"""

from __future__ import annotations

import pytest
from ionotrail.terminal import limits
from ionotrail.terminal.errors import UsageError
from ionotrail.terminal.wire import (
    FRAME_KINDS,
    IDLE_PROBE_BYTES,
    Ack,
    AckBlock,
    AuthFragment,
    Command,
    CommandBlock,
    Fragment,
    FrameType,
    Probe,
    Reply,
    ReplyStatus,
    encode,
    formats,
    kind_of,
    layout,
    registry,
)

# One frame of each type, by hand, with the head byte docs/wire.md gives it
# (format version 1 in the high nibble, the type value in the low nibble).
BY_HAND = [
    (Probe(7, 1), "probe", 0x11),
    (Fragment(1, 7, 3, 0, b"x"), "fragment", 0x12),
    (Ack(7, AckBlock(1, 3, complete=True)), "ack", 0x13),
    (Command(7, 1, CommandBlock(1, 2)), "command", 0x14),
    (Reply(1, 7, 1, ReplyStatus.OK), "reply", 0x15),
    (AuthFragment(Fragment(1, 7, 3, 0, b"x"), 0, 1, bytes(8)), "tagged", 0x16),
]


@pytest.mark.parametrize(("frame", "name", "head"), BY_HAND, ids=[name for _, name, _ in BY_HAND])
def test_each_frame_type_has_one_entry_that_agrees_with_the_wire(frame: object, name: str, head: int) -> None:
    kind = kind_of(frame)
    assert kind.name == name
    assert kind.head == head
    assert kind.representation is type(frame)
    assert FRAME_KINDS[kind.frame_type] is kind
    assert encode(frame)[0] == head  # type: ignore[arg-type]
    assert kind.from_fields(kind.declaration.parse(encode(frame)).fields.value) == frame  # type: ignore[arg-type]


def test_every_frame_type_is_registered_once() -> None:
    assert sorted(int(t) for t in FRAME_KINDS) == [1, 2, 3, 4, 5, 6]  # docs/wire.md: types 1 to 6 are assigned
    assert len({kind.representation for kind in FRAME_KINDS.values()}) == len(FrameType)
    assert len(registry.BY_HEAD) == len(FrameType)


def test_fast_paths_are_exactly_fragment_probe_and_ack() -> None:
    # DEVELOPERS.md: "The fast paths (fragment, probe, ack)".
    fast = {kind.name for kind in FRAME_KINDS.values() if kind.fast_decode is not None}
    assert fast == {"fragment", "probe", "ack"}
    assert set(registry.FAST_DECODERS) == {0x11, 0x12, 0x13}
    assert set(registry.FAST_ENCODERS) == {Probe, Fragment, Ack}


@pytest.mark.parametrize("thing", [("not", "a", "frame"), AckBlock(1, 1), b"\x12", None])
def test_kind_of_refuses_what_is_not_a_frame(thing: object) -> None:
    with pytest.raises(UsageError):
        kind_of(thing)


def test_the_old_table_name_is_a_view_of_the_registry() -> None:
    declarations = [formats.PROBE, formats.FRAGMENT, formats.ACK, formats.COMMAND, formats.REPLY, formats.TAGGED]
    assert registry.FRAME_FORMATS == dict(zip(FrameType, declarations, strict=True))


# --- sizes and layouts read from the declarations -------------------------------------


def test_idle_probe_is_seven_bytes() -> None:
    # docs/wire.md: head 1, master 1, sequence 2, flags 1, CRC 2 = 7.
    assert IDLE_PROBE_BYTES == 7
    assert IDLE_PROBE_BYTES == len(encode(Probe(0, 0))) == len(encode(Probe(255, 0xFFFF)))
    assert Probe(7, 4711).wire_length == IDLE_PROBE_BYTES


def test_fragment_overhead_is_read_off_the_declaration() -> None:
    # docs/wire.md: "fragment header: 8 bytes, plus 2 of CRC = 10 bytes of overhead".
    fields = layout.frame_fields(formats.FRAGMENT)
    assert layout.fixed_bytes(fields, ("payload",)) == limits.FRAGMENT_HEADER_BYTES == 8
    assert layout.frame_bytes(formats.FRAGMENT, ("payload",)) == limits.FRAGMENT_OVERHEAD_BYTES == 10


def test_layouts_by_hand() -> None:
    # From docs/wire.md's field tables: fragment head B, terminal H, master B,
    # message_id H, position H; position = final, urgent, downlink, 13-bit offset.
    fragment = layout.frame_fields(formats.FRAGMENT)
    assert layout.packer(fragment, ("head", "terminal", "master", "message_id", "position"), "t").format == ">BHBHH"
    position = layout.bits(fragment, "position")
    assert [(b.shift, b.width) for b in position.values()] == [(15, 1), (14, 1), (13, 1), (0, 13)]
    assert position["offset"].mask == 0x1FFF
    probe_flags = layout.bits(layout.frame_fields(formats.PROBE), "flags")
    assert {name: b.mask for name, b in probe_flags.items()} == {"poll": 0x80, "ack": 0x40, "command": 0x20, "reserved": 0x1F}
    status = layout.bits(formats.ACK_BLOCK, "status")
    assert {name: b.mask for name, b in status.items()} == {
        "complete": 0x80, "downlink": 0x40, "refused": 0x20, "reserved": 0x10, "count": 0x0F,
    }


def test_a_packer_refuses_fields_out_of_order() -> None:
    with pytest.raises(layout.StaleLayout, match="starts with"):
        layout.packer(layout.frame_fields(formats.FRAGMENT), ("head", "master", "terminal"), "fragment")
    with pytest.raises(layout.StaleLayout, match="not a fixed-size"):
        layout.packer(layout.frame_fields(formats.FRAGMENT), layout.names(layout.frame_fields(formats.FRAGMENT)), "x")


@pytest.mark.parametrize(
    ("name", "value"),
    [
        ("FRAGMENT_HEADER_BYTES", 9),
        ("FRAGMENT_OVERHEAD_BYTES", 11),
        ("FRAME_CRC_BYTES", 4),
        ("MIN_FRAME_BYTES", 2),
        ("MAX_ACK_RANGES", 16),
        ("MESSAGE_CRC_BYTES", 2),
    ],
)
def test_a_limit_restating_a_declared_size_is_checked(monkeypatch: pytest.MonkeyPatch, name: str, value: int) -> None:
    monkeypatch.setattr(limits, name, value)
    with pytest.raises(layout.StaleLayout, match=name):
        layout.check_limits()
