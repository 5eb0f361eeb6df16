"""``ionotrail bench``: figures measured side by side with their baselines."""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any

from ionotrail.harness.cli.common import UserError


def add_parser(commands: Any) -> None:
    p = commands.add_parser(
        "bench",
        help="benchmarks: codec, reassembly, channel, link, power (figures, side by side with baselines)",
        description=(
            "Benchmarks print figures measured side by side in one run.\n"
            "  codec   encode/decode frames per second of every frame type, next to a\n"
            "          bare struct pack/unpack of the same field layout; ratio = how many\n"
            "          times slower than the baseline.\n"
            "  reassembly  fragments per second through sender and receiver (with encode and\n"
            "          decode) and framing efficiency, for 16-256 byte fragment payloads.\n"
            "  channel seconds to draw a year of trails for the demo link window by window\n"
            "          (and one day).\n"
            "  link    a backlogged terminal on the demo day, every fragment policy on the same\n"
            "          trails: efficiency (payload / oracle bound), against the open-time bound\n"
            "          too, payload bits per used burst, and speedup (simulated seconds per\n"
            "          wall second).  The fragment policy alone: receiver always on, no uplink gate,\n"
            "          no transmit duty-cycle limit.\n"
            "  power   a demo year (--days), every power policy (always-on, fixed-duty, adaptive) on\n"
            "          the same channel, weather and sensor: messages delivered, deadlines missed,\n"
            "          lowest state of charge, energy used, delivered messages per kWh, listening\n"
            "          hours, median and 95th-percentile latency of alarms and routine reports.\n"
            "          Runs the policies two at a time; a year takes a few minutes."
        ),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("what", choices=["codec", "reassembly", "channel", "link", "power"], help="which benchmark")
    p.add_argument("--json", action="store_true", help="print the figures as JSON")
    p.add_argument("--seconds", type=float, default=0.6, help="time per measurement (default 0.6)")
    p.add_argument("--hours", type=float, default=24.0, help="link: simulated hours of the demo day (default 24)")
    p.add_argument("--days", type=float, default=365.0, help="power: simulated days of the demo scenario (default 365)")
    p.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    from ionotrail.harness.bench import suite as bench

    progress = None if args.json else (lambda name: print(f"measuring {name} ...", file=sys.stderr, flush=True))
    if args.what == "codec":
        report = bench.codec_benchmark(seconds=args.seconds, progress=progress)
        text = bench.format_codec(report)
    elif args.what == "reassembly":
        report = bench.reassembly_benchmark(seconds=args.seconds, progress=progress)
        text = bench.format_reassembly(report)
    elif args.what == "power":
        if not (0.01 <= args.days <= 366):
            raise UserError(f"--days {args.days:g}: expected 0.01 to 366 days")
        report = bench.power_benchmark(days=args.days, progress=progress)
        text = bench.format_power(report)
    elif args.what == "channel":
        report = bench.channel_benchmark(progress=progress)
        text = bench.format_channel(report)
    else:
        from ionotrail.harness.channel.scenario import ScenarioError

        if not (0.01 <= args.hours <= 24 * 31):
            raise UserError(f"--hours {args.hours:g}: expected 0.01 to {24 * 31} hours")
        try:
            report = bench.link_benchmark(hours=args.hours, progress=progress)
        except ScenarioError as exc:
            raise UserError(str(exc)) from None
        text = bench.format_link(report)
    print(json.dumps(report, indent=2) if args.json else text)
    return 0
