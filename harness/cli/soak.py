"""``ionotrail soak``: the reference terminal and the master on two modems for hours, with a report."""

from __future__ import annotations

import argparse
import asyncio
import json
import math
import re
import sys
from typing import Any

from ionotrail.harness.cli.common import SAFETY, UserError, load_scenario


def duration(text: str) -> float:
    """Seconds from ``90``, ``90s``, ``10m``, ``2h`` or ``1h30m``."""
    match = re.fullmatch(r"(?:(\d+(?:\.\d+)?)h)?(?:(\d+(?:\.\d+)?)m)?(?:(\d+(?:\.\d+)?)s?)?", text.strip())
    if not text.strip() or match is None or not any(match.groups()):
        raise argparse.ArgumentTypeError(f"{text!r} is not a duration like 600, 10m, 2h or 1h30m")
    hours, minutes, seconds = (float(g) if g else 0.0 for g in match.groups())
    return hours * 3600 + minutes * 60 + seconds


def add_parser(commands: Any) -> None:
    p = commands.add_parser(
        "soak",
        help="soak-test two modems: the reference terminal on one, the master on the other",
        description=(
            "Run the reference terminal on one modem and the master on the other for a wall-clock\n"
            "duration (real modems, or the two lines of 'ionotrail emulate'), with a live progress\n"
            "line, then wait for the last messages and report: messages offered, delivered, lost,\n"
            "duplicated, latency, frame error rate against SNR, modem resets, reconnects, serial\n"
            "errors and resident memory.  Exit status 0 when every message offered was delivered\n"
            "exactly once (none lost, duplicated, altered or still pending), 1 otherwise, 2 for\n"
            "bad usage."
        ),
        epilog=SAFETY,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--terminal", required=True, metavar="URL", help="the terminal's modem (device, pseudo-terminal, socket://HOST:PORT)")
    p.add_argument("--master", required=True, metavar="URL", help="the master's modem")
    p.add_argument("--duration", type=duration, default=7200.0, metavar="TIME", help="how long the terminal reports: 600, 10m, 2h (default 2h)")
    p.add_argument("--drain", type=duration, default=300.0, metavar="TIME", help="how long to wait afterwards for the last messages (default 5m)")
    p.add_argument("--every", type=float, default=60.0, metavar="S", help="the terminal reports every S seconds (default 60)")
    p.add_argument("--dialect", default="ionotrail", metavar="NAME", help="host-modem dialect of both modems: ionotrail or kiss")
    p.add_argument("--policy", default="adaptive", metavar="NAME", help="fragment policy: adaptive, fixed-N or stop-and-wait")
    p.add_argument("--scenario", metavar="FILE", help="scenario file (TOML); default: the demo link (use the emulator's)")
    p.add_argument("--set", action="append", metavar="KEY=VALUE", help="override a scenario value (repeatable)")
    p.add_argument("--seed", type=int, help="seed (overrides scenario.seed)")
    p.add_argument("--json", metavar="FILE", help="write the report as JSON to FILE")
    p.add_argument("--plot", metavar="FILE.png", help="draw the frame error rate against SNR to a PNG file")
    p.add_argument("--trace", metavar="FILE.jsonl", help="write every frame either station sent or heard to FILE")
    p.set_defaults(handler=run)


def _line(snapshot: dict[str, Any]) -> str:
    fer = "-" if snapshot["frame_error_rate"] is None else f"{snapshot['frame_error_rate']:.3f}"
    return (
        f"{snapshot['phase']} {snapshot['elapsed_s']:>8.0f} s  offered {snapshot['offered']:>5}  delivered {snapshot['delivered']:>5}  "
        f"frame errors {fer}  resets {snapshot['resets']}  reconnects {snapshot['reconnects']}"
    )


def run(args: argparse.Namespace) -> int:
    from ionotrail.harness.runners.soak import soak
    from ionotrail.terminal.errors import UsageError
    from ionotrail.terminal.modem.dialects import dialect

    if not (math.isfinite(args.every) and args.every > 0):
        raise UserError(f"--every {args.every:g}: expected a positive number of seconds")
    if args.duration <= 0:
        raise UserError(f"--duration {args.duration:g}: expected a positive duration")
    try:
        dialect(args.dialect)
    except UsageError as exc:
        raise UserError(f"--dialect {args.dialect}: {exc}") from None
    scenario = load_scenario(args)
    if args.plot is not None and not args.plot.lower().endswith(".png"):
        raise UserError(f"--plot {args.plot}: the plot is a PNG file; name it .png")
    from ionotrail.harness.cli.stations import open_output

    trace = open_output("--trace", args.trace)
    tty = sys.stderr.isatty()

    def progress(snapshot: dict[str, Any]) -> None:
        print(("\r" if tty else "") + _line(snapshot), end="" if tty else "\n", file=sys.stderr, flush=True)

    try:
        report = asyncio.run(
            soak(scenario, args.terminal, args.master, duration_s=args.duration, drain_s=args.drain, report_every_s=args.every,
                 dialect_name=args.dialect, policy=args.policy, progress=progress, trace=trace)
        )
    except OSError as exc:
        raise UserError(f"cannot open a modem: {exc}") from None
    finally:
        if trace is not None:
            trace.close()
    if tty:
        print(file=sys.stderr)
    m, lat = report["messages"], report["latency_s"]
    print(
        f"soak {report['wall_seconds']:.0f} s: offered {m['offered']}, delivered {m['delivered']}, lost {m['lost']}, "
        f"duplicated {m['duplicated']}, pending {m['pending']}; latency median {lat['p50']} s, 95 % {lat['p95']} s; "
        f"frame error rate {report['frames']['frame_error_rate']}; modem resets {report['modem']['resets']}, "
        f"reconnects {report['serial']['reconnects']}, serial errors {report['serial']['errors']}; "
        f"resident memory {report['rss_mb']['start']} -> {report['rss_mb']['end']} MiB"
    )
    if args.json:
        with open(args.json, "w", encoding="utf-8") as out:
            json.dump(report, out, indent=2)
    if args.plot:
        _plot(report, args.plot)
    return 0 if m["delivered"] == m["offered"] and not (m["lost"] or m["duplicated"] or m["unexpected"] or m["pending"]) else 1


def _plot(report: dict[str, Any], path: str) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    rows = [r for r in report["frames"]["by_snr"] if r["snr_db_from"] is not None]
    edges = [r["snr_db_from"] for r in rows]
    fig, (heard, errors) = plt.subplots(2, 1, sharex=True, figsize=(7, 5))
    heard.bar(edges, [r["frames"] for r in rows], width=2.7, align="edge", color="tab:blue")
    heard.set_ylabel("frames heard")
    rates = [r["frame_error_rate"] for r in rows]
    errors.bar(edges, rates, width=2.7, align="edge", color="tab:red")
    errors.set_ylim(0, max([0.05, *[1.2 * rate for rate in rates]]))
    errors.set_ylabel("frame error rate")
    errors.set_xlabel("SNR the master's modem reported, dB (3 dB bins)")
    m = report["messages"]
    heard.set_title(f"soak {report['wall_seconds']:.0f} s: {m['delivered']} of {m['offered']} delivered, {m['lost']} lost, {m['duplicated']} duplicated")
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)
