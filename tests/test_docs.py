"""The tables in docs/ are generated from the code that defines them."""

from __future__ import annotations

import re
from pathlib import Path

import pytest
from ionotrail.harness.reports import wiredoc
from ionotrail.terminal import limits
from ionotrail.terminal.wire import IDLE_PROBE_BYTES, AckBlock

DOCS = Path(__file__).resolve().parent.parent / "docs"


@pytest.mark.parametrize("name", ["wire.md", "delivery.md", "scenario.md", "link.md", "modem.md", "power.md", "outbox.md"])
def test_document_is_up_to_date(name: str) -> None:
    text = (DOCS / name).read_text(encoding="utf-8")
    assert wiredoc.render(text) == text, f"docs/{name} is stale: run `ionotrail docs`"


def test_every_generator_has_a_table() -> None:
    names: set[str] = set()
    for name in ("wire.md", "delivery.md", "scenario.md", "link.md", "modem.md", "power.md", "outbox.md"):
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


def _prose(name: str) -> str:
    """A document with its line breaks folded, as a reader sees the sentences."""
    return " ".join((DOCS / name).read_text(encoding="utf-8").split())


def test_sizes_stated_in_prose_match_the_declarations() -> None:
    # Hand-written sentences restate a few sizes; each is checked against its one definition.
    wire = _prose("wire.md")
    overhead = limits.FRAGMENT_OVERHEAD_BYTES
    stated = [
        (wire, f"fragment header: {limits.FRAGMENT_HEADER_BYTES} bytes, plus {limits.FRAME_CRC_BYTES} of CRC"),
        (wire, f"= {overhead} bytes of overhead"),
        (wire, f"16/{16 + overhead} = {round(100 * 16 / (16 + overhead))} %"),
        (wire, f"an idle probe is {IDLE_PROBE_BYTES} bytes"),
        (wire, f"longer than {limits.MAX_FRAME_BYTES} bytes or shorter than {limits.MIN_FRAME_BYTES};"),
        (wire, f"frames of at most {limits.MAX_FRAME_BYTES} bytes"),
        (wire, f"{limits.MAX_ACK_RANGES} ranges ({AckBlock(1, 1, tuple((2 * i, 2 * i + 1) for i in range(limits.MAX_ACK_RANGES))).wire_length}-byte block)"),
        (_prose("delivery.md"), f"budget of {overhead} bytes or less (a fragment's overhead)"),
        (_prose("delivery.md"), f"a {IDLE_PROBE_BYTES}-byte probe at 4800 bit/s"),
        (_prose("link.md"), f"({overhead} bytes: header and CRC)"),
        (_prose("link.md"), f"a {IDLE_PROBE_BYTES}-byte probe outlives"),
    ]
    for text, sentence in stated:
        assert sentence in text, f"the documents no longer say: {sentence!r}"
