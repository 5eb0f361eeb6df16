"""The ``ionotrail`` command line: the parser assembled from one module per
sub-command (decode, bench, channel, simulate, emulate, docs in this folder), and main().

Every sub-command is a thin layer over library functions: parse arguments,
call, print.  Errors a user can fix print one line and exit with status 2;
received bytes that fail to decode exit with status 1, and so does a run that
broke inside (one line, no report).
"""

from __future__ import annotations

import argparse
import os
import sys
from collections.abc import Sequence

from ionotrail.harness.cli import bench, channel, decode, docs, emulate, simulate, soak, stations
from ionotrail.harness.cli.common import SAFETY, UserError
from ionotrail.harness.runners.vtime import CallbackError

DESCRIPTION = """\
ionotrail: protocol stack, channel simulator and test harness for
meteor-burst data-collection terminals (river gauges, weather and snow
stations, pipeline monitors reporting over ionized meteor trails).
"""

COMMANDS = (decode, bench, channel, simulate, emulate, stations, soak, docs)
"""In the order the help lists them; each module adds its parser and handler."""


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="ionotrail",
        description=DESCRIPTION,
        epilog=SAFETY,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    from ionotrail import __version__

    parser.add_argument("--version", action="version", version=f"ionotrail {__version__}")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND")
    for command in COMMANDS:
        command.add_parser(commands)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 2
    try:
        return int(args.handler(args))
    except UserError as exc:
        print(f"ionotrail {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except CallbackError as exc:  # the run broke; its figures would mean nothing
        print(f"ionotrail {args.command}: error: the run failed: {exc}", file=sys.stderr)
        return 1
    except BrokenPipeError:  # output piped into head and the like
        sys.stdout = open(os.devnull, "w")  # noqa: SIM115 (stays open: it silences the flush at exit)
        return 0
    except KeyboardInterrupt:
        print(f"ionotrail {args.command}: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
