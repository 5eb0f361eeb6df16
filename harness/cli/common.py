"""What the sub-commands share: the one-line user error, the safety note, the
scenario options of ``channel`` and ``simulate``, the short-path warning and the
progress bar."""

from __future__ import annotations

import argparse
import logging
import os
import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any

log = logging.getLogger(__name__)

REDRAW_INTERVAL_S = 0.25
"""Least wall time between two redraws of a progress bar: a person reads four a second at most."""

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
    """The warning ``channel`` and ``simulate`` log for a path too short for meteor burst."""
    from ionotrail.harness.channel.geometry import SHORT_PATH_KM

    if distance_km < SHORT_PATH_KM:
        log.warning("a %.0f km path is short for meteor burst; expect few usable trails with ordinary antennas", distance_km)


def clock(seconds: float) -> str:
    """Simulated time as ``[Nd ]HH:MM:SS``."""
    whole = int(seconds)
    days, rest = divmod(whole, 86400)
    text = f"{rest // 3600:02d}:{rest % 3600 // 60:02d}:{rest % 60:02d}"
    return f"{days}d {text}" if days else text


def _day_clock(days: float) -> str:
    """Simulated time in a progress bar, to the minute: ``2d 18:50``."""
    minutes = int(days * 1440)
    return f"{minutes // 1440}d {minutes % 1440 // 60:02d}:{minutes % 60:02d}"


def _terminal_size() -> tuple[int, int]:
    """Columns and lines of the terminal on stderr; 80 by 24 where it reports none (a pseudo-terminal never sized)."""
    try:
        size = os.get_terminal_size(sys.stderr.fileno())
    except (OSError, ValueError):
        return 80, 24
    return size.columns or 80, size.lines or 24


@contextmanager
def progress_bar(label: str, total_s: float, quiet: bool = False) -> Iterator[Callable[[float, str], None] | None]:
    """A progress bar on stderr counting simulated time, ``show(done_s, note)``; None off a terminal or when quiet.

    The bar (tqdm) shows the simulated time done and the period, the wall time
    elapsed and left, and the rate in simulated days per wall second; ``show``
    may be called as often as wanted, the bar redraws at most every
    REDRAW_INTERVAL_S.  It is closed, on its last figures, however the block ends.
    """
    if quiet or not sys.stderr.isatty():
        yield None
        return
    from tqdm import tqdm

    class SimulatedTime(tqdm):  # type: ignore[type-arg]
        note = ""

        @property
        def format_dict(self) -> dict[str, Any]:  # computed only when the bar redraws
            d: dict[str, Any] = super().format_dict
            rate = d["rate"] or (d["n"] / d["elapsed"] if d["elapsed"] else 0.0)  # simulated days per wall second
            speed = "?" if not rate else f"{rate:,.2f} days/s" if rate >= 1 else f"{1 / rate:,.1f} s/day"
            simulated, period = _day_clock(d["n"]), _day_clock(d["total"])
            # The note goes first when the line would leave the bar less than ten columns.
            width = len(self.desc) + len(simulated) + len(period) + len(speed) + 28 + len(self.note) + 10
            note = self.note if width <= (d["ncols"] or 80) else ""
            return {**d, "simulated": simulated, "period": period, "speed": speed, "note": note}

    days = total_s / 86400
    columns, lines = _terminal_size()
    bar = SimulatedTime(
        total=days,
        desc=label,
        unit="day",
        file=sys.stderr,
        ncols=columns,
        nrows=lines,
        mininterval=REDRAW_INTERVAL_S,
        bar_format="{desc} {percentage:3.0f}%|{bar}| {simulated} of {period} [{elapsed}<{remaining}, {speed}]{note}",
    )

    def show(done_s: float, note: str = "") -> None:
        bar.note = f" {note}" if note else ""
        bar.update(min(days, done_s / 86400) - bar.n)

    try:
        yield show
    finally:
        bar.close()
