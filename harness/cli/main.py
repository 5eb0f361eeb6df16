"""The ``ionotrail`` command line.

Every sub-command is a thin layer over library functions: parse arguments,
call, print.  Errors a user can fix print one line and exit with status 2;
received bytes that fail to decode exit with status 1.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from collections.abc import Iterator, Sequence
from importlib import resources
from pathlib import Path
from typing import Any

from ionotrail.harness.runners.vtime import CallbackError
from ionotrail.terminal.errors import CrcMismatch, DecodeError
from ionotrail.terminal.wire import Frame
from ionotrail.terminal.wire.codec import decode
from ionotrail.terminal.wire.serial_framing import Deframer

SAFETY = """\
safety: meteor-burst links use VHF transmitters of tens to hundreds of watts.
Transmit only with the authorisation your administration requires, on your
assigned frequency; keep people outside the RF exposure distance of the
antenna; ground masts and fit lightning protection; respect the charge and
temperature limits of the battery chemistry; follow work-at-height and
remote-site practice.  Local regulations and licensed practice take
precedence over anything this tool says.
"""

DESCRIPTION = """\
ionotrail: protocol stack, channel simulator and test harness for
meteor-burst data-collection terminals (river gauges, weather and snow
stations, pipeline monitors reporting over ionized meteor trails).
"""


class UserError(Exception):
    """A problem with the command line or an input file, shown as one line."""


# --- decode ------------------------------------------------------------------------


def _demo_capture() -> str:
    return resources.files("ionotrail.harness.demo").joinpath("capture.hex").read_text(encoding="utf-8")


def _hex_frames(lines: Iterator[str], origin: str) -> Iterator[tuple[str, bytes | str]]:
    """(label, bytes) per frame, or (label, error text) for a line that is not hex."""
    for number, line in enumerate(lines, 1):
        text = line.split("#", 1)[0].strip().replace(" ", "").replace(":", "")
        if not text:
            continue
        label = f"{origin}:{number}"
        try:
            yield label, bytes.fromhex(text)
        except ValueError:
            yield label, f"not a hexadecimal frame: {text[:40]!r}"


def _cobs_frames(data: bytes, origin: str) -> Iterator[tuple[str, bytes | str]]:
    deframer = Deframer()
    for number, record in enumerate(deframer.feed(data + b"\x00"), 1):
        yield f"{origin}#{number}", record
    lost = deframer.counters.bad_records + deframer.counters.overruns
    if lost:
        yield f"{origin}", f"{lost} serial records were not valid COBS or too long; skipped"


def _field_value(value: Any) -> Any:
    if isinstance(value, (bytes, bytearray)):
        return value.hex()
    if hasattr(value, "_asdict"):
        return {k: _field_value(v) for k, v in value._asdict().items()}
    if isinstance(value, tuple):
        return [_field_value(v) for v in value]
    if hasattr(value, "name") and hasattr(value, "value"):  # enum
        return value.name.lower()
    return value


def _frame_table(label: str, raw: bytes, frame: Frame) -> str:
    rows = [f"{label}  {frame.frame_type.name.lower()} frame, {len(raw)} bytes, CRC-16 ok"]
    width = max(len(k) for k in frame._fields)
    for key, value in frame._asdict().items():
        if hasattr(value, "_asdict"):  # a nested block
            inner = ", ".join(f"{k}={_show(k, v)}" for k, v in value._asdict().items())
            rows.append(f"  {key:<{width}}  {inner}")
        else:
            rows.append(f"  {key:<{width}}  {_show(key, value)}")
    return "\n".join(rows)


def _show(key: str, value: Any) -> str:
    """One field as a radio engineer would want to read it."""
    if value is None:
        return "-"
    if key in ("terminal", "poll"):
        return f"0x{value:04x} ({value})"
    if key == "ranges":
        return " ".join(f"[{start},{end})" for start, end in value) or "none"
    if isinstance(value, bytes):
        if not value:
            return "(empty)"
        readable = all(0x20 <= byte < 0x7F for byte in value)
        return value.hex() + (f'  "{value.decode("ascii")}"' if readable else "")
    if hasattr(value, "name") and hasattr(value, "value"):  # an enum
        return str(value.name.lower())
    return str(value)


def _describe_error(raw: bytes, exc: DecodeError) -> str:
    detail = exc.message
    if isinstance(exc, CrcMismatch):
        from ionotrail.terminal.wire.crc import crc16

        detail += f" (received 0x{raw[-2:].hex()}, computed 0x{crc16(raw[:-2]):04x})"
    return detail


def cmd_decode(args: argparse.Namespace) -> int:
    sources: list[tuple[str, bytes | str]] = []
    if args.demo:
        sources += _hex_frames(iter(_demo_capture().splitlines()), "demo")
    for path in args.file or []:
        try:
            if args.cobs:
                sources += _cobs_frames(Path(path).read_bytes(), path)
            else:
                sources += _hex_frames(iter(Path(path).read_text(encoding="utf-8").splitlines()), path)
        except (OSError, UnicodeDecodeError) as exc:
            raise UserError(f"cannot read {path}: {getattr(exc, 'strerror', None) or exc}") from None
    sources += _hex_frames(iter(args.hex), "arg")
    if not sources:
        raise UserError("nothing to decode: give HEX frames, --file FILE or --demo")
    failures = 0
    first = True
    for label, item in sources:
        if isinstance(item, str):
            failures += 1
            _emit_error(args, label, None, "bad_input", item)
            continue
        try:
            frame = decode(item)
        except DecodeError as exc:
            failures += 1
            _emit_error(args, label, item, exc.reason.value, _describe_error(item, exc))
            continue
        if args.json:
            record = {"source": label, "type": frame.frame_type.name.lower(), "length": len(item), "crc": "ok"}
            record["fields"] = _field_value(frame)
            print(json.dumps(record))
        else:
            print(("" if first else "\n") + _frame_table(label, item, frame))
            first = False
    return 1 if failures else 0


def _emit_error(args: argparse.Namespace, label: str, raw: bytes | None, reason: str, message: str) -> None:
    if args.json:
        record: dict[str, Any] = {"source": label, "error": reason, "message": message}
        if raw is not None:
            record["length"] = len(raw)
        print(json.dumps(record))
    else:
        print(f"{label}: error: {reason}: {message}", file=sys.stderr)


# --- bench -------------------------------------------------------------------------


def cmd_bench(args: argparse.Namespace) -> int:
    from ionotrail.harness.bench import suite as bench

    progress = None if args.json else (lambda name: print(f"measuring {name} ...", file=sys.stderr, flush=True))
    if args.what == "codec":
        report = bench.codec_benchmark(seconds=args.seconds, progress=progress)
        text = bench.format_codec(report)
    elif args.what == "reassembly":
        report = bench.reassembly_benchmark(seconds=args.seconds, progress=progress)
        text = bench.format_reassembly(report)
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


# --- docs --------------------------------------------------------------------------


DOCUMENTS = ("docs/wire.md", "docs/delivery.md", "docs/scenario.md", "docs/link.md")


def cmd_docs(args: argparse.Namespace) -> int:
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


# --- channel -----------------------------------------------------------------------


def _scenario(args: argparse.Namespace) -> Any:
    from ionotrail.harness.channel import scenario

    overrides = list(args.set or [])
    if getattr(args, "days", None) is not None:
        overrides.append(f"scenario.duration_hours={args.days * 24}")
    if getattr(args, "hours", None) is not None:
        overrides.append(f"scenario.duration_hours={args.hours}")
    if getattr(args, "seed", None) is not None:
        overrides.append(f"scenario.seed={args.seed}")
    try:
        return scenario.load(args.scenario, overrides)
    except scenario.ScenarioError as exc:
        raise UserError(str(exc)) from None


def _progress(label: str) -> Any:
    if not sys.stderr.isatty():
        return None

    def show(fraction: float) -> None:
        bar = "#" * int(30 * fraction)
        print(f"\r{label} [{bar:<30}] {100 * fraction:5.1f}%", end="" if fraction < 1 else "\n", file=sys.stderr, flush=True)

    return show


def cmd_channel(args: argparse.Namespace) -> int:
    from ionotrail.harness.channel import forecast as fc
    from ionotrail.harness.channel.geometry import SHORT_PATH_KM, PathError
    from ionotrail.harness.channel.model import TrailSet

    scenario = _scenario(args)
    try:
        trails = TrailSet(scenario, keep="all" if args.trails else "usable", progress=_progress("generating trails"))
    except PathError as exc:
        raise UserError(str(exc)) from None
    if trails.geometry.distance_km < SHORT_PATH_KM:
        print(
            f"warning: a {trails.geometry.distance_km:.0f} km path is short for meteor burst; "
            "expect few usable trails with ordinary antennas",
            file=sys.stderr,
        )
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
    print(json.dumps(report, indent=2) if args.json else _forecast_table(report))
    return 0


# --- simulate ----------------------------------------------------------------------


def _clock(seconds: float) -> str:
    whole = int(seconds)
    days, rest = divmod(whole, 86400)
    text = f"{rest // 3600:02d}:{rest % 3600 // 60:02d}:{rest % 60:02d}"
    return f"{days}d {text}" if days else text


def _simulate_progress() -> Any:
    if not sys.stderr.isatty():
        return None

    def show(done: float, total: float, delivered: int) -> None:
        fraction = min(1.0, done / total) if total else 1.0
        bar = "#" * int(30 * fraction)
        end = "\n" if fraction >= 1 else ""
        print(f"\rsimulating [{bar:<30}] {_clock(done)} of {_clock(total)}, {delivered} delivered", end=end, file=sys.stderr, flush=True)

    return show


def _open_output(name: str) -> Any:
    try:
        return open(name, "w", encoding="utf-8")
    except OSError as exc:
        raise UserError(f"cannot write {name}: {exc.strerror}") from None


def cmd_simulate(args: argparse.Namespace) -> int:
    from ionotrail.harness.channel.geometry import PathError, path_geometry
    from ionotrail.harness.emulators.master import json_lines_sink
    from ionotrail.harness.runners.simulate import simulate
    from ionotrail.terminal.errors import UsageError
    from ionotrail.terminal.link.policy import by_name

    scenario = _scenario(args)
    try:
        by_name(args.policy, scenario.bit_rate)
    except UsageError as exc:
        raise UserError(str(exc)) from None
    outputs = [name for name in (args.json, args.plot, args.deliveries) if name]
    for name in outputs:
        if Path(name).is_dir():
            raise UserError(f"{name} is a directory; give a file name")
        if not Path(name).resolve().parent.is_dir():
            raise UserError(f"cannot write {name}: no such directory {Path(name).resolve().parent}")
    if len({Path(name).resolve() for name in outputs}) < len(outputs):
        raise UserError("--json, --plot and --deliveries must name different files")
    if args.plot and Path(args.plot).suffix.lower() != ".png":
        raise UserError(f"--plot {args.plot}: the timeline is drawn as PNG; give a name ending in .png")
    try:  # a path the model cannot use fails now, before any output file is touched
        path_geometry(scenario.terminal.lat_deg, scenario.terminal.lon_deg, scenario.master.lat_deg, scenario.master.lon_deg, scenario.reflection_height_km)
    except PathError as exc:
        raise UserError(str(exc)) from None
    # Outputs are opened before the run, so a bad path fails at once, not after it.
    report_file = _open_output(args.json) if args.json else None
    deliveries_file = _open_output(args.deliveries) if args.deliveries else None
    try:
        run = simulate(
            scenario,
            args.policy,
            record_timeline=bool(args.plot),
            on_delivery=json_lines_sink(deliveries_file) if deliveries_file else None,
            progress=_simulate_progress(),
        )
    except PathError as exc:
        raise UserError(str(exc)) from None
    except BaseException:
        if report_file:  # a failed run leaves no report behind
            report_file.close()
            Path(args.json).unlink(missing_ok=True)
        raise
    finally:
        if deliveries_file:
            deliveries_file.close()
    report = run.report
    if report_file:
        with report_file:
            json.dump(report, report_file, indent=2)
            report_file.write("\n")
    if args.plot:
        from ionotrail.harness.reports.timeline import plot_timeline

        assert run.timeline is not None
        plot_timeline(run.timeline, run.deliveries, report, Path(args.plot))
    print(_simulation_table(report))
    for label, name in (("report", args.json), ("timeline", args.plot), ("deliveries", args.deliveries)):
        if name:
            print(f"wrote {label} to {name}", file=sys.stderr)
    return 0


def _fmt_s(value: float | None) -> str:
    return "-" if value is None else f"{value:,.1f} s"


def _simulation_table(r: dict[str, Any]) -> str:
    m, lat, bits, fr = r["messages"], r["latency_s"], r["bits"], r["frames"]
    reasons = ", ".join(f"{k} {v}" for k, v in m["abandoned_reasons"].items())
    utilisation = "-" if r["utilisation"] is None else f"{100 * r['utilisation']:.2f} %"
    lines = [
        f"{r['scenario']}  (seed {r['seed']}, policy {r['policy']})",
        f"simulated {_clock(r['sim_seconds'])} in {r['wall_seconds']:.1f} s of wall time ({r['speedup']:,.0f}x real time)",
        "",
        f"  messages   offered {m['offered']:>7,}   delivered {m['delivered']:>7,}   pending {m['pending']:>5,}   "
        f"abandoned {m['abandoned']:>5,}{f' ({reasons})' if reasons else ''}   delivered twice {m['duplicates_delivered']}",
        f"  latency    median {_fmt_s(lat['p50'])}   95 % {_fmt_s(lat['p95'])}   99 % {_fmt_s(lat['p99'])}   worst {_fmt_s(lat['max'])}",
        f"  channel    {r['trails']['total']:,} trails opened the path, {r['trails']['used']:,} carried data;"
        f" capacity bound {bits['capacity_bound'] / 1e6:,.2f} Mbit",
        f"  payload    {bits['payload_delivered'] / 1e3:,.1f} kbit delivered = {utilisation} of the capacity bound",
        f"  air        {fr['sent']:,} frames sent, {fr['received']:,} received intact, {fr['crc_failed']:,} failed their CRC;"
        f" {r['probes']['heard']:,} probes heard in {r['bursts']:,} bursts",
    ]
    return "\n".join(lines)


def _forecast_table(report: dict[str, Any]) -> str:
    g = report["geometry"]
    lines = [
        f"{report['scenario']}  (seed {report['seed']}, {report['period']['hours']:g} h from {report['period']['start']})",
        f"path {g['distance_km']:.0f} km, forward-scatter half-angle {g['half_angle_deg']:.1f} deg, "
        f"elevation {g['elevation_deg']:.1f} deg at {g['reflection_height_km']:g} km",
        f"trails drawn {report['trails']['generated']}, open both ways {report['trails']['usable']}; "
        f"100-byte message takes {report['link']['message_airtime_s'] * 1000:.0f} ms on the air",
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


def _add_scenario_options(p: argparse.ArgumentParser) -> None:
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


# --- parser ------------------------------------------------------------------------


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

    p = commands.add_parser(
        "decode",
        help="print received frames field by field",
        description=(
            "Decode over-the-air frames and print every field, with the CRC status.\n"
            "Frames are hexadecimal (spaces and colons allowed), one per argument or,\n"
            "with --file, one per line ('#' starts a comment).  With --cobs, --file\n"
            "is a raw capture of the host-modem serial line (COBS records).\n"
            "Exit status: 0 all frames decoded, 1 some frame refused, 2 bad usage."
        ),
        epilog=SAFETY,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("hex", nargs="*", metavar="HEX", help="a frame in hexadecimal, e.g. 12 0a31 07 04d2 8080 ...")
    p.add_argument("--file", action="append", metavar="FILE", help="read frames from FILE (repeatable)")
    p.add_argument("--cobs", action="store_true", help="FILE is a binary serial capture of COBS records")
    p.add_argument("--demo", action="store_true", help="decode the bundled demo capture (one opening of a demo link)")
    p.add_argument("--json", action="store_true", help="one JSON object per frame instead of tables")
    p.set_defaults(handler=cmd_decode)

    p = commands.add_parser(
        "bench",
        help="benchmarks: codec, reassembly, channel, link (figures, side by side with baselines)",
        description=(
            "Benchmarks print figures measured side by side in one run.\n"
            "  codec   encode/decode frames per second of every frame type, next to a\n"
            "          bare struct pack/unpack of the same field layout; ratio = how many\n"
            "          times slower than the baseline.\n"
            "  reassembly  fragments per second through sender and receiver (with encode and\n"
            "          decode) and framing efficiency, for 16-256 byte fragment payloads.\n"
            "  channel seconds to generate a year of trails for the demo link (and one day).\n"
            "  link    a backlogged terminal on the demo day, every fragment policy on the same\n"
            "          trails: efficiency (payload / capacity bound), payload bits per used\n"
            "          burst, and speedup (simulated seconds per wall second)."
        ),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("what", choices=["codec", "reassembly", "channel", "link"], help="which benchmark")
    p.add_argument("--json", action="store_true", help="print the figures as JSON")
    p.add_argument("--seconds", type=float, default=0.6, help="time per measurement (default 0.6)")
    p.add_argument("--hours", type=float, default=24.0, help="link: simulated hours of the demo day (default 24)")
    p.set_defaults(handler=cmd_bench)

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
    _add_scenario_options(p)
    p.add_argument("--json", action="store_true", help="print the forecast as JSON")
    p.add_argument("--plot", metavar="FILE.png", help="draw the hourly figures to a PNG file")
    p.add_argument("--trails", metavar="FILE.jsonl", help="also write every generated trail, one JSON object a line")
    p.add_argument("--by-month", action="store_true", help="add a row per calendar month of the period")
    p.set_defaults(handler=cmd_channel)

    p = commands.add_parser(
        "simulate",
        help="run a terminal and a master over the simulated channel (the main job)",
        description=(
            "Simulate the demo link (or --scenario FILE) in virtual time: the reference terminal\n"
            "reports a sensor reading every 15 minutes (40-120 bytes) and the odd alarm, and\n"
            "talks through the meteor-burst channel to an emulated master that probes,\n"
            "acknowledges and reassembles.  Prints what was offered, delivered, pending and\n"
            "abandoned, the latency distribution, and how much of the channel's capacity the\n"
            "traffic used.  The same seed replays the same run exactly.\n"
            "Fragment policies: adaptive (default), fixed-N (N payload bytes), stop-and-wait."
        ),
        epilog=SAFETY,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    _add_scenario_options(p)
    p.add_argument("--policy", default="adaptive", metavar="NAME", help="fragment policy: adaptive, fixed-N (8-256) or stop-and-wait")
    p.add_argument("--json", metavar="FILE", help="write the report as JSON to FILE")
    p.add_argument("--plot", metavar="FILE.png", help="draw the timeline (bursts, deliveries, queue) to a PNG file")
    p.add_argument("--deliveries", metavar="FILE.jsonl", help="write every delivered message to FILE, one JSON object a line")
    p.set_defaults(handler=cmd_simulate)

    p = commands.add_parser(
        "docs",
        help="regenerate the generated tables in docs/",
        description=(
            "Rewrite the generated tables of docs/wire.md (frame layouts, from the format\n"
            "declarations), docs/delivery.md (link limits, from terminal/limits.py),\n"
            "docs/scenario.md (scenario keys, from harness/channel/scenario.py) and\n"
            "docs/link.md (the link's transition table, from terminal/link.py)."
        ),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--path", action="append", help="a document to refresh (repeatable; default: all four)")
    p.add_argument("--check", action="store_true", help="only report whether the document is stale (exit 1 if so)")
    p.set_defaults(handler=cmd_docs)
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
        sys.stdout = open(os.devnull, "w")  # silence the flush at exit
        return 0
    except KeyboardInterrupt:
        print(f"ionotrail {args.command}: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
