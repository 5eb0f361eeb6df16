"""docs/wire.md's field tables are generated from the declarations."""

from __future__ import annotations

import re
from pathlib import Path

from harness import wiredoc

WIRE_MD = Path(__file__).resolve().parent.parent / "docs" / "wire.md"


def test_wire_document_is_up_to_date() -> None:
    text = WIRE_MD.read_text(encoding="utf-8")
    assert wiredoc.render(text) == text, "docs/wire.md is stale: run `ionotrail docs`"


def test_every_declaration_has_a_table() -> None:
    names = set(re.findall(r"<!-- generated: ([a-z-]+) -->", WIRE_MD.read_text(encoding="utf-8")))
    assert names == set(wiredoc.SECTIONS)


def test_a_hand_edited_table_is_caught() -> None:
    text = WIRE_MD.read_text(encoding="utf-8")
    tampered = text.replace("| `message_id` | 2 bytes |", "| `message_id` | 1 byte |", 1)
    assert tampered != text
    assert wiredoc.render(tampered) == text


def test_every_field_is_documented() -> None:
    for name, declaration in wiredoc.SECTIONS.items():
        for row in wiredoc.table(declaration).splitlines()[2:]:
            assert not row.endswith("|  |"), f"{name}: undocumented field in {row}"
