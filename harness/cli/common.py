"""What the sub-commands share: the one-line user error, the safety note, the
scenario options of ``channel`` and ``simulate`` and the progress bar."""

from __future__ import annotations

import argparse
import sys
from typing import Any

SAFETY = """\
safety: meteor-burst links use VHF transmitters of tens to hundreds of watts.
Transmit only with the authorisation your administration requires, on your
assigned frequency; keep people outside the RF exposure distance of the
antenna; ground masts and fit lightning protection; respect the charge and
temperature limits of the battery chemistry; follow work-at-height and
remote-site practice.  Local regulations and licensed practice take
precedence over anything this tool says.
"""


class UserError(Exception):
    """A problem with the command line or an input file, shown as one line."""


def add_scenario_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--scenario", metavar="FILE", help="scenario file (TOML); default: the built-in demo link")
    p.add_argument(
        "--set",
        action="append",
        metavar="KEY=VALUE",
        help="override a scenario value, e.g. --set link.bit_rate=9600 --set terminal.tx_power_w=250 (repeatable)",
    )
    p.add_argument("--seed", type=int, help="seed (overrides scenario.seed)")
    period = p.add_mutually_exclusive_group()
    period.add_argument("--hours", type=float, help="length of the period, hours")
    period.add_argument("--days", type=float, help="length of the period, days")


def load_scenario(args: argparse.Namespace) -> Any:
    """The scenario the options name, or :class:`UserError`."""
    from ionotrail.harness.channel import scenario

    options: list[tuple[str, str, Any]] = []  # shorthands, so that an error names the option given
    if getattr(args, "days", None) is not None:
        options.append((f"--days {args.days:g}", "scenario.duration_hours", args.days * 24))
    if getattr(args, "hours", None) is not None:
        options.append((f"--hours {args.hours:g}", "scenario.duration_hours", args.hours))
    if getattr(args, "seed", None) is not None:
        options.append((f"--seed {args.seed}", "scenario.seed", args.seed))
    try:
        return scenario.load(args.scenario, args.set or [], options)
    except scenario.ScenarioError as exc:
        raise UserError(str(exc)) from None


def warn_if_short(distance_km: float) -> None:
    """The warning ``channel`` and ``simulate`` print for a path too short for meteor burst."""
    from ionotrail.harness.channel.geometry import SHORT_PATH_KM

    if distance_km < SHORT_PATH_KM:
        print(
            f"warning: a {distance_km:.0f} km path is short for meteor burst; expect few usable trails with ordinary antennas",
            file=sys.stderr,
        )


def progress_bar(label: str) -> Any:
    """A progress callback drawing a bar on a terminal's stderr; None when stderr is not one."""
    if not sys.stderr.isatty():
        return None

    def show(fraction: float) -> None:
        bar = "#" * int(30 * fraction)
        print(f"\r{label} [{bar:<30}] {100 * fraction:5.1f}%", end="" if fraction < 1 else "\n", file=sys.stderr, flush=True)

    return show
