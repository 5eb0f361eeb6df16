"""The ``ionotrail`` command line: the parser assembled from one module per
sub-command (decode, bench, channel, simulate, emulate, docs in this folder), and main().

Every sub-command is a thin layer over library functions: parse arguments,
call, print.  Errors a user can fix print one line and exit with status 2;
received bytes that fail to decode exit with status 1, and so does a run that
broke inside (one line, no report).  Warnings and notes go through the logging
module to stderr: warnings by default, notes with -v, errors only with -q.
"""

from __future__ import annotations

import argparse
import logging
import os
import sys
from collections.abc import Sequence

from ionotrail.harness.cli import bench, channel, decode, docs, emulate, keys, simulate, soak, stations
from ionotrail.harness.cli.common import SAFETY, UserError
from ionotrail.harness.runners.vtime import CallbackError

DESCRIPTION = """\
ionotrail: protocol stack, channel simulator and test harness for
meteor-burst data-collection terminals (river gauges, weather and snow
stations, pipeline monitors reporting over ionized meteor trails).
"""

COMMANDS = (decode, bench, channel, simulate, emulate, stations, soak, keys, docs)
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
    for sub in commands.choices.values():
        talk = sub.add_mutually_exclusive_group()
        talk.add_argument("-v", "--verbose", action="store_true", help="also say what the command is doing")
        talk.add_argument("-q", "--quiet", action="store_true", help="print errors only: no warnings, no progress bar")
    return parser


class _Format(logging.Formatter):
    """``warning: ...`` and ``error: ...``; notes (INFO) as they are."""

    def format(self, record: logging.LogRecord) -> str:
        text = super().format(record)
        return text if record.levelno < logging.WARNING else f"{record.levelname.lower()}: {text}"


class _Handler(logging.StreamHandler):  # type: ignore[type-arg]
    """Writes above a progress bar when one is drawn, so the bar is not torn."""

    def emit(self, record: logging.LogRecord) -> None:
        tqdm = sys.modules.get("tqdm")
        if tqdm is None:  # no bar can be drawn
            super().emit(record)
            return
        try:
            tqdm.tqdm.write(self.format(record), file=self.stream)
        except (OSError, ValueError):  # a closed or broken stream, as StreamHandler treats it
            self.handleError(record)


def _log_to_stderr(args: argparse.Namespace) -> tuple[logging.Handler, int]:
    """A handler on the root logger for this command (WARNING, -v INFO, -q ERROR); the handler and the old level."""
    root = logging.getLogger()
    handler = _Handler(sys.stderr)
    handler.setFormatter(_Format("%(message)s"))
    old = root.level
    root.setLevel(logging.ERROR if args.quiet else logging.INFO if args.verbose else logging.WARNING)
    root.addHandler(handler)
    return handler, old


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 2
    handler, level = _log_to_stderr(args)
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
    finally:  # main() may be called again in the same process
        logging.getLogger().removeHandler(handler)
        logging.getLogger().setLevel(level)


if __name__ == "__main__":
    sys.exit(main())
