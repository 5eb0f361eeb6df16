"""``ionotrail simulate``: the main job, one run of a link, its summary and files."""

from __future__ import annotations

import argparse
import contextlib
import json
import logging
import sys
from collections.abc import Callable
from pathlib import Path
from typing import IO, Any

from ionotrail.harness.cli.common import (
    SAFETY,
    UserError,
    add_scenario_options,
    clock,
    load_scenario,
    progress_bar,
    warn_if_short,
)

log = logging.getLogger(__name__)
POWER_POLICIES = ("always-on", "fixed-duty", "adaptive")  # terminal/power/scheduler.py POLICIES (imported late: startup time)


def add_parser(commands: Any) -> None:
    p = commands.add_parser(
        "simulate",
        help="run a terminal and a master over the simulated channel (the main job)",
        description=(
            "Simulate the demo link (or --scenario FILE) in virtual time: the reference terminal\n"
            "reports a sensor reading every 15 minutes (40-120 bytes) and the odd alarm, and\n"
            "talks through the meteor-burst channel to an emulated master that probes,\n"
            "acknowledges and reassembles.  Prints what was offered, delivered, pending and\n"
            "abandoned, the latency distribution, and how much of the channel's capacity the\n"
            "traffic used, and where the terminal's energy went: its battery and solar panel,\n"
            "what it listened and transmitted, and how its power scheduler degraded service as\n"
            "the battery fell.  The same seed replays the same run exactly.\n"
            "Fragment policies: adaptive (default), fixed-N (N payload bytes), stop-and-wait.\n"
            "Power policies: adaptive (default), fixed-duty, always-on (scenario power.policy)."
        ),
        epilog=SAFETY,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    add_scenario_options(p)
    p.add_argument("--policy", default="adaptive", metavar="NAME", help="fragment policy: adaptive, fixed-N (8-256) or stop-and-wait")
    p.add_argument("--power", metavar="NAME", choices=POWER_POLICIES, help="power policy: " + ", ".join(POWER_POLICIES) + " (default: the scenario's)")
    p.add_argument("--no-backoff", action="store_true", help="keep transmitting when frames go unacknowledged while probes arrive (no uplink gate)")
    p.add_argument("--json", metavar="FILE", help="write the report as JSON to FILE")
    p.add_argument("--plot", metavar="FILE.png", help="draw the timeline (bursts, deliveries, queue, battery and listening) to a PNG file")
    p.add_argument("--deliveries", metavar="FILE.jsonl", help="write every delivered message to FILE, one JSON object a line")
    p.add_argument("--trace", metavar="FILE.jsonl", help="write every frame either station sent or heard to FILE (ionotrail decode --trace reads it)")
    p.set_defaults(handler=run)


def _open_output(name: str) -> IO[str]:
    try:
        return open(name, "w", encoding="utf-8")  # closed by run(); opened early so a bad path fails at once
    except OSError as exc:
        raise UserError(f"cannot write {name}: {exc.strerror}") from None


def run(args: argparse.Namespace) -> int:
    from ionotrail.harness.channel.geometry import PathError, path_geometry
    from ionotrail.harness.emulators.master import json_lines_sink
    from ionotrail.harness.runners.simulate import simulate
    from ionotrail.terminal.errors import UsageError
    from ionotrail.terminal.link.policy import by_name

    scenario = load_scenario(args)
    try:
        by_name(args.policy, scenario.bit_rate)
    except UsageError as exc:
        raise UserError(str(exc)) from None
    outputs = [name for name in (args.json, args.plot, args.deliveries, args.trace) if name]
    for name in outputs:
        if Path(name).is_dir():
            raise UserError(f"{name} is a directory; give a file name")
        if not Path(name).resolve().parent.is_dir():
            raise UserError(f"cannot write {name}: no such directory {Path(name).resolve().parent}")
    if len({Path(name).resolve() for name in outputs}) < len(outputs):
        raise UserError("--json, --plot, --deliveries and --trace must name different files")
    if args.plot and Path(args.plot).suffix.lower() != ".png":
        raise UserError(f"--plot {args.plot}: the timeline is drawn as PNG; give a name ending in .png")
    try:  # a path the model cannot use fails now, before any output file is touched
        geometry = path_geometry(
            scenario.terminal.lat_deg, scenario.terminal.lon_deg, scenario.master.lat_deg, scenario.master.lon_deg, scenario.reflection_height_km
        )
    except PathError as exc:
        raise UserError(str(exc)) from None
    warn_if_short(geometry.distance_km)
    log.info(
        "simulating %s of %s (%s), a %.0f km path, policy %s, seed %d",
        clock(scenario.duration_s), scenario.name, scenario.source, geometry.distance_km, args.policy, scenario.seed,
    )
    # Outputs are opened before the run, so a bad path fails at once, not after it.
    report_file = _open_output(args.json) if args.json else None
    deliveries_file = _open_output(args.deliveries) if args.deliveries else None
    trace_file = _open_output(args.trace) if args.trace else None
    try:
        with contextlib.ExitStack() as bars:
            show = bars.enter_context(progress_bar("simulating", scenario.duration_s, quiet=args.quiet))
            bounding: list[Callable[[float, str], None] | None] = []

            def bound_progress(done: float, total: float) -> None:
                if not bounding:  # the run is over: its bar closes on its last figures, the bounds' opens
                    bars.close()
                    bounding.append(bars.enter_context(progress_bar("oracle bound", total, quiet=args.quiet)))
                if bounding[0] is not None:
                    bounding[0](done, "")

            result = simulate(
                scenario,
                args.policy,
                record_timeline=bool(args.plot),
                on_delivery=json_lines_sink(deliveries_file) if deliveries_file else None,
                progress=(lambda done, total, delivered: show(done, f"{delivered:,} delivered")) if show else None,
                bound_progress=bound_progress if show else None,
                trace=trace_file,
                power_policy=args.power,
                uplink_backoff=False if args.no_backoff else None,
            )
    except PathError as exc:
        raise UserError(str(exc)) from None
    except BaseException:
        if report_file:  # a failed run leaves no report behind
            report_file.close()
            Path(args.json).unlink(missing_ok=True)
        raise
    finally:
        for stream in (deliveries_file, trace_file):
            if stream:
                stream.close()
    report = result.report
    if report_file:
        with report_file:
            json.dump(report, report_file, indent=2)
            report_file.write("\n")
    if args.plot:
        from ionotrail.harness.reports.timeline import plot_timeline

        assert result.timeline is not None
        plot_timeline(result.timeline, result.deliveries, report, Path(args.plot))
    print(simulation_table(report))
    for label, name in (("report", args.json), ("timeline", args.plot), ("deliveries", args.deliveries), ("trace", args.trace)):
        if name:
            print(f"wrote {label} to {name}", file=sys.stderr)
    return 0


def _fmt_s(value: float | None) -> str:
    return "-" if value is None else f"{value:,.1f} s"


def simulation_table(r: dict[str, Any]) -> str:
    m, lat, bits, fr = r["messages"], r["latency_s"], r["bits"], r["frames"]
    reasons = ", ".join(f"{k} {v}" for k, v in m["abandoned_reasons"].items())
    utilisation = "-" if r["utilisation"] is None else f"{100 * r['utilisation']:.2f} %"
    lines = [
        f"{r['scenario']}  (seed {r['seed']}, policy {r['policy']})",
        f"simulated {clock(r['sim_seconds'])} in {r['wall_seconds']:.1f} s of wall time ({r['speedup']:,.0f}x real time)",
        "",
        (
            f"  messages   offered {m['offered']:>7,}   delivered {m['delivered']:>7,}   pending {m['pending']:>5,}   "
            f"abandoned {m['abandoned']:>5,}{f' ({reasons})' if reasons else ''}   delivered twice {m['duplicates_delivered']}"
        ),
        f"  latency    median {_fmt_s(lat['p50'])}   95 % {_fmt_s(lat['p95'])}   99 % {_fmt_s(lat['p99'])}   worst {_fmt_s(lat['max'])}",
        (
            f"  channel    {r['trails']['total']:,} trails opened the path, {r['trails']['used']:,} carried data;"
            f" capacity bound {bits['capacity_bound'] / 1e6:,.2f} Mbit (open time),"
            f" oracle bound {bits['oracle_bound'] / 1e6:,.2f} Mbit"
        ),
        f"  payload    {bits['payload_delivered'] / 1e3:,.1f} kbit delivered = {utilisation} of the oracle bound",
        (
            f"  air        {fr['sent']:,} frames sent, {fr['received']:,} received intact, {fr['crc_failed']:,} failed their CRC;"
            f" {r['probes']['heard']:,} probes heard in {r['bursts']:,} bursts"
        ),
        *energy_lines(r),
    ]
    return "\n".join(lines)


def _pct(value: float) -> str:
    return f"{100 * value:.1f} %"


def energy_lines(r: dict[str, Any]) -> list[str]:
    """The energy part of the summary: where the energy went, and what to do about it."""
    e, lat, missed = r["energy"], r["latency_s"], r["messages"]["deadlines_missed"]
    used = e["consumed_wh"]
    total = sum(used.values())
    parts = ", ".join(f"{name} {wh:,.2f}" for name, wh in sorted(used.items(), key=lambda kv: -kv[1]) if wh > 0)
    wasted = e["wasted_tx_seconds"]
    share = wasted / e["tx_seconds"] if e["tx_seconds"] > 0 else 0.0
    lines = [
        (
            f"  energy     policy {e['policy']}: battery {_pct(e['soc_initial'])} -> {_pct(e['soc_final'])},"
            f" lowest {_pct(e['soc_min'])} (reserve {_pct(e['reserve_soc'])}); harvested {e['harvested_wh']:,.1f} Wh, used {total:,.1f} Wh ({parts})"
        ),
        (
            f"  radio      listened {e['listen_hours']:,.2f} h, transmitted {e['tx_seconds']:,.1f} s"
            f" of which {wasted:,.1f} s ({_pct(share)}) did not arrive; uplink back-offs {e['uplink_backoffs']:,}"
        ),
        (
            f"  deadlines  alarms: median {_fmt_s(lat['alarm']['p50'])}, worst {_fmt_s(lat['alarm']['max'])}, {missed['alarm']:,} missed;"
            f" routine: median {_fmt_s(lat['routine']['p50'])}, 95 % {_fmt_s(lat['routine']['p95'])}, {missed['routine']:,} missed"
        ),
    ]
    advice = []
    if e["hours_below_reserve"] > 0:
        advice.append(f"{e['hours_below_reserve']:,.1f} h below the reserve: a larger panel or battery, or a leaner policy, would keep routine traffic running")
    if e["charge_refused_hours"] > 0:
        advice.append(f"charging refused for {e['charge_refused_hours']:,.1f} h (cells below their charging temperature): insulate or heat the battery")
    if e["unserved_wh"] > 0:
        advice.append(f"the load disconnect opened ({e['unserved_wh']:,.2f} Wh unserved): the terminal browned out")
    if share > 0.5 and e["tx_seconds"] > 1:
        advice.append("most transmissions did not arrive: the uplink is the weaker direction (raise terminal power or gain, or keep the back-off on)")
    changes = e["degradation"]
    if changes:
        shown = "; ".join(f"{c['at']} {c['level']} ({_pct(c['soc'])})" for c in changes[:4])
        more = f" and {e['level_changes'] - 4:,} more" if e["level_changes"] > 4 else ""
        hours = ", ".join(f"{level} {h:,.1f} h" for level, h in e["level_hours"].items() if h > 0)
        lines.append(f"  service    {shown}{more}; time at each level: {hours}")
    o = r.get("outbox")
    if o is not None and o["writes_per_message"] is not None:
        lines.append(
            f"  outbox     {o['writes']:,} synchronous writes, {o['writes_per_message']:.2f} per message accepted"
            f" ({o['range_updates']:,} for partly acknowledged messages; the id counter rode along {o['counter_writes']:,} times)"
        )
    lines.extend(f"  note       {text}" for text in advice)
    return lines
