"""``ionotrail emulate``: two emulated radio modems and the channel between them,
on serial lines any terminal software can open (docs/emulator.md)."""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import math
import signal
import sys
import tempfile
import threading
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
        "emulate",
        help="emulate the terminal's and the master's radio modems and the meteor-burst channel, on serial lines",
        description=(
            "Emulate the two radio modems of a link scenario (the terminal's station and the\n"
            "master's) and the meteor-burst channel between them.  Each modem's host side is a\n"
            "pseudo-terminal whose path is printed at the start (or, with --tcp, a loopback TCP\n"
            "port; or an existing serial device, e.g. a development board on a USB-serial\n"
            "adapter).  Frames one host transmits arrive at the other only when the channel\n"
            "model says they survive, after their airtime, with SNR and frequency offset from\n"
            "the model; the modems never read the frames they carry.\n"
            "\n"
            "Every time in seconds is emulated time, which runs --time-scale times faster than\n"
            "the wall clock.  Faults on stdin, one a line (type help): noise [ROLE] N [in],\n"
            "reset ROLE, unplug ROLE S, stall ROLE S, late ROLE S [FOR], status; ROLE is\n"
            "terminal or master.  Ends at --duration, the end of the scenario's period, or\n"
            "Ctrl-C, and prints one summary line per station."
        ),
        epilog=SAFETY,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    add_scenario_options(p)
    p.add_argument("--time-scale", type=float, default=1.0, metavar="X", help="run X times faster than real time (default 1)")
    p.add_argument("--start-at", type=float, default=0.0, metavar="S", help="start S emulated seconds into the scenario's period")
    p.add_argument("--duration", type=float, metavar="S", help="end after S emulated seconds (default: the scenario's period)")
    p.add_argument("--dialect", metavar="NAME", help="dialect of both modems: ionotrail (default) or kiss")
    p.add_argument("--terminal-dialect", metavar="NAME", help="dialect of the terminal's modem")
    p.add_argument("--master-dialect", metavar="NAME", help="dialect of the master's modem")
    p.add_argument("--tcp", action="store_true", help="listen on loopback TCP ports instead of pseudo-terminals")
    p.add_argument("--terminal-device", metavar="PATH", help="serve the terminal's modem on this existing serial device")
    p.add_argument("--master-device", metavar="PATH", help="serve the master's modem on this existing serial device")
    p.add_argument("--baudrate", type=int, default=115200, metavar="N", help="baud rate of --*-device lines (default 115200)")
    p.add_argument("--run-dir", metavar="DIR", help="where the pseudo-terminal links go (default: a fresh temporary directory)")
    p.add_argument("--faults-every", type=float, metavar="S", help="inject a fault every S emulated seconds on average (seeded)")
    p.set_defaults(handler=run)


def _positive(value: float | None, option: str) -> None:
    if value is not None and not (math.isfinite(value) and value > 0):
        raise UserError(f"{option} {value:g}: expected a positive number")


def run(args: argparse.Namespace) -> int:
    from ionotrail.harness.channel.geometry import PathError
    from ionotrail.harness.channel.model import Channel, TrailSet
    from ionotrail.harness.emulators.lines import DeviceLine, Line, PtyLine, TcpLine
    from ionotrail.harness.emulators.modem import ROLES, ModemEmulator
    from ionotrail.terminal.errors import UsageError
    from ionotrail.terminal.modem.dialects import dialect

    _positive(args.time_scale, "--time-scale")
    _positive(args.duration, "--duration")
    _positive(args.faults_every, "--faults-every")
    if args.dialect and (args.terminal_dialect or args.master_dialect):
        raise UserError("give --dialect, or --terminal-dialect and --master-dialect, not both")
    scenario = load_scenario(args)
    if not (math.isfinite(args.start_at) and 0 <= args.start_at < scenario.duration_s):
        raise UserError(f"--start-at {args.start_at:g}: expected 0 to {scenario.duration_s:g} s (the scenario's period)")
    try:
        dialects = {role: dialect(getattr(args, f"{role}_dialect") or args.dialect or "ionotrail") for role in ROLES}
    except UsageError as exc:
        raise UserError(str(exc)) from None
    try:
        with progress_bar("generating trails", scenario.duration_s, quiet=args.quiet) as show:
            trails = TrailSet(scenario, progress=(lambda fraction: show(fraction * scenario.duration_s)) if show else None)
            trails.trails  # noqa: B018 -- draws the period now, under the progress bar
    except PathError as exc:
        raise UserError(str(exc)) from None
    warn_if_short(trails.geometry.distance_km)

    made_dir = args.run_dir is None
    run_dir = Path(tempfile.mkdtemp(prefix="ionotrail-emulate-")) if made_dir else Path(args.run_dir)
    if not made_dir:
        try:
            run_dir.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise UserError(f"cannot use {run_dir} as the run directory: {exc.strerror}") from None
    lines: dict[str, Line] = {}
    for role in ROLES:
        device = getattr(args, f"{role}_device")
        lines[role] = DeviceLine(device, args.baudrate) if device else TcpLine() if args.tcp else PtyLine(run_dir / role)
    emulator = ModemEmulator(
        Channel(trails),
        scenario,
        lines,
        dialects,
        time_scale=args.time_scale,
        start_s=args.start_at,
        faults_every=args.faults_every,
    )
    try:
        return asyncio.run(_serve(emulator, args.duration))
    finally:
        if made_dir:
            with contextlib.suppress(OSError):
                run_dir.rmdir()


async def _serve(emulator: Any, duration: float | None) -> int:
    loop = asyncio.get_running_loop()
    stop = asyncio.Event()
    for sig in (signal.SIGINT, signal.SIGTERM):
        loop.add_signal_handler(sig, stop.set)
    try:
        await emulator.start()
    except (OSError, ValueError) as exc:  # a device that cannot be opened (SerialException is an OSError)
        await emulator.close()
        raise UserError(f"cannot open a modem line: {exc}") from None
    try:
        for role, modem in emulator.modems.items():
            print(f"{role} modem: {modem.line.address} (dialect {modem.dialect.name})", flush=True)
        s = emulator.scenario
        print(
            f"emulating {s.name} (seed {emulator.seed}) from {emulator.start_s:g} s at {emulator.time_scale:g}x real time; "
            "type help for the fault commands, Ctrl-C to end",
            flush=True,
        )

        def command(text: str) -> None:
            if text.strip().lower() in ("quit", "exit"):
                stop.set()
                return
            error = emulator.command(text)
            if error is not None:
                print(f"error: {error}", flush=True)

        def read_stdin() -> None:  # a daemon thread: a blocked read never holds up the exit
            with contextlib.suppress(OSError, ValueError, RuntimeError):  # no usable stdin, or the loop closed
                for text in sys.stdin:
                    loop.call_soon_threadsafe(command, text)

        if sys.stdin is not None and not sys.stdin.closed:
            threading.Thread(target=read_stdin, name="emulate-commands", daemon=True).start()
        reason = await emulator.wait(duration, stop)
    finally:
        await emulator.close()
    print(f"{emulator.stamp()} ended: {reason}", flush=True)
    for line in emulator.summary():
        print(line, flush=True)
    return 0
