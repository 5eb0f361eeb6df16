"""``ionotrail channel``: the hour-by-hour forecast of a link scenario."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

from ionotrail.harness.cli.common import (
    SAFETY,
    UserError,
    add_scenario_options,
    load_scenario,
    progress_bar,
    warn_if_short,
)


def add_parser(commands: Any) -> None:
    p = commands.add_parser(
        "channel",
        help="forecast a meteor-burst link: geometry, bursts, duty cycle, capacity by hour",
        description=(
            "Generate the trails of a link scenario from published meteor physics and print\n"
            "the link's geometry and, for each hour of the day (UTC): usable bursts per hour\n"
            "(open in both directions), mean and median open time, duty cycle, the capacity\n"
            "bound (uplink bits a genie could move at the link rate) and the expected wait to\n"
            "deliver a 100-byte message.  Every figure replays exactly from the seed."
        ),
        epilog=SAFETY,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    add_scenario_options(p)
    p.add_argument("--json", action="store_true", help="print the forecast as JSON")
    p.add_argument("--plot", metavar="FILE.png", help="draw the hourly figures to a PNG file")
    p.add_argument("--trails", metavar="FILE.jsonl", help="also write every generated trail, one JSON object a line")
    p.add_argument("--by-month", action="store_true", help="add a row per calendar month of the period")
    p.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    from ionotrail.harness.channel import forecast as fc
    from ionotrail.harness.channel.geometry import PathError
    from ionotrail.harness.channel.model import TrailSet

    scenario = load_scenario(args)
    try:
        with progress_bar("generating trails", scenario.duration_s, quiet=args.quiet) as show:
            trails = TrailSet(scenario, keep="all" if args.trails else "usable", progress=(lambda fraction: show(fraction * scenario.duration_s)) if show else None)
            trails.trails  # noqa: B018 -- draws the period now, under the progress bar
    except PathError as exc:
        raise UserError(str(exc)) from None
    warn_if_short(trails.geometry.distance_km)
    report = fc.forecast(trails)
    if args.by_month:
        report["monthly"] = fc.monthly(trails)
    if args.trails:
        try:
            with open(args.trails, "w", encoding="utf-8") as out:
                count = fc.write_trails(trails, out)
        except OSError as exc:
            raise UserError(f"cannot write {args.trails}: {exc.strerror}") from None
        print(f"wrote {count} trails to {args.trails}", file=sys.stderr)
    if args.plot:
        from ionotrail.harness.channel.plot import plot_forecast

        plot_forecast(report, Path(args.plot))
        print(f"wrote {args.plot}", file=sys.stderr)
    print(json.dumps(report, indent=2) if args.json else forecast_table(report))
    return 0


def forecast_table(report: dict[str, Any]) -> str:
    g = report["geometry"]
    lines = [
        f"{report['scenario']}  (seed {report['seed']}, {report['period']['hours']:g} h from {report['period']['start']})",
        (
            f"path {g['distance_km']:.0f} km, forward-scatter half-angle {g['half_angle_deg']:.1f} deg, "
            f"elevation {g['elevation_deg']:.1f} deg at {g['reflection_height_km']:g} km"
        ),
        (
            f"trails drawn {report['trails']['generated']}, open both ways {report['trails']['usable']}; "
            f"100-byte message takes {report['link']['message_airtime_s'] * 1000:.0f} ms on the air"
        ),
        "",
        f"{'UTC':>3} {'bursts/h':>9} {'mean s':>7} {'median s':>8} {'duty':>6} {'kbit/h':>8} {'wait 100 B':>10}",
    ]
    for r in report["hourly"]:
        wait = f"{r['wait_100B_s']:.0f} s" if r["wait_100B_s"] is not None else "-"
        lines.append(
            f"{r['hour']:>3} {r['bursts_per_hour']:>9.1f} {r['mean_open_s']:>7.2f} {r['median_open_s']:>8.2f} "
            f"{100 * r['duty_cycle']:>5.1f}% {r['capacity_bits_per_hour'] / 1000:>8.0f} {wait:>10}"
        )
    if "totals" in report:
        t = report["totals"]
        lines.append(
            f"all {t['bursts_per_hour']:>9.1f} {'':>7} {'':>8} {100 * t['duty_cycle']:>5.1f}% {t['capacity_bits_per_hour'] / 1000:>8.0f}"
        )
    for m in report.get("monthly", []):
        lines.append(f"{m['month']}: {m['bursts_per_hour']:.1f} bursts/h, duty {100 * m['duty_cycle']:.1f}%, {m['capacity_bits_per_hour'] / 1000:.0f} kbit/h")
    lines.append("")
    lines.append("bursts: trails open in both directions; capacity: uplink bits a genie could move at the link rate.")
    return "\n".join(lines)
