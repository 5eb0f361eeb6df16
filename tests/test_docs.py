"""The tables in docs/ are generated from the code that defines them."""

from __future__ import annotations

import re
from pathlib import Path

import pytest
from ionotrail.harness.reports import wiredoc

DOCS = Path(__file__).resolve().parent.parent / "docs"


@pytest.mark.parametrize("name", ["wire.md", "delivery.md", "scenario.md", "link.md"])
def test_document_is_up_to_date(name: str) -> None:
    text = (DOCS / name).read_text(encoding="utf-8")
    assert wiredoc.render(text) == text, f"docs/{name} is stale: run `ionotrail docs`"


def test_every_generator_has_a_table() -> None:
    names: set[str] = set()
    for name in ("wire.md", "delivery.md", "scenario.md", "link.md"):
        names |= set(re.findall(r"<!-- generated: ([a-z-]+) -->", (DOCS / name).read_text(encoding="utf-8")))
    assert names == set(wiredoc.GENERATORS)


def test_a_hand_edited_table_is_caught() -> None:
    text = (DOCS / "wire.md").read_text(encoding="utf-8")
    tampered = text.replace("| `message_id` | 2 bytes |", "| `message_id` | 1 byte |", 1)
    assert tampered != text
    assert wiredoc.render(tampered) == text


def test_every_field_and_limit_is_documented() -> None:
    for name, declaration in wiredoc.SECTIONS.items():
        for row in wiredoc.table(declaration).splitlines()[2:]:
            assert not row.endswith("|  |"), f"{name}: undocumented field in {row}"
    for row in wiredoc.limits_table().splitlines()[2:]:
        assert not row.endswith("|  |"), f"limit without a reason: {row}"
