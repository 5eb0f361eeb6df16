"""``ionotrail docs``: the generated tables in docs/, rewritten or checked."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from ionotrail.harness.cli.common import UserError

DOCUMENTS = ("docs/wire.md", "docs/delivery.md", "docs/scenario.md", "docs/link.md", "docs/modem.md", "docs/power.md", "docs/outbox.md")


def add_parser(commands: Any) -> None:
    p = commands.add_parser(
        "docs",
        help="regenerate the generated tables in docs/",
        description=(
            "Rewrite the generated tables of docs/wire.md (frame layouts, from the format\n"
            "declarations), docs/delivery.md (link limits, from terminal/limits.py),\n"
            "docs/scenario.md (scenario keys, from harness/channel/scenario.py),\n"
            "docs/link.md (the link's transition table, from terminal/link/table.py),\n"
            "docs/modem.md (host-modem records, from terminal/modem/records.py),\n"
            "docs/power.md (degradation levels and battery chemistries, from terminal/power/) and\n"
            "docs/outbox.md (durable records, from terminal/outbox/records.py)."
        ),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--path", action="append", help="a document to refresh (repeatable; default: all of them)")
    p.add_argument("--check", action="store_true", help="only report whether the document is stale (exit 1 if so)")
    p.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    from ionotrail.harness.reports import wiredoc

    stale = 0
    for name in args.path or DOCUMENTS:
        path = Path(name)
        if not path.is_file():
            raise UserError(f"{path} not found: run from the repository root or give --path")
        text = path.read_text(encoding="utf-8")
        fresh = wiredoc.render(text)
        if args.check:
            stale += fresh != text
            print(f"{path}: {'stale, run: ionotrail docs' if fresh != text else 'up to date'}")
        else:
            if fresh != text:
                path.write_text(fresh, encoding="utf-8")
            print(f"{path}: {'rewritten' if fresh != text else 'already up to date'}")
    return 1 if stale else 0
