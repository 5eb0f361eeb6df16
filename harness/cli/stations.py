"""``ionotrail serve`` and ``ionotrail master``: the reference terminal, or the master,
on a radio modem over a serial line (a device, a pseudo-terminal, socket://host:port)."""

from __future__ import annotations

import argparse
import asyncio
import dataclasses
import json
import math
import signal
import sys
from typing import IO, Any

from ionotrail.harness.cli.common import SAFETY, UserError, load_scenario

DIALECT_HELP = "host-modem dialect: ionotrail (default; docs/modem.md) or kiss"


def _common(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--port", required=True, metavar="URL", help="the modem: a device path, a pseudo-terminal, socket://HOST:PORT"
    )
    p.add_argument("--dialect", default="ionotrail", metavar="NAME", help=DIALECT_HELP)
    p.add_argument(
        "--scenario",
        metavar="FILE",
        help="scenario file (TOML) for addresses, frequencies, bit rate, power; default: the demo link",
    )
    p.add_argument("--set", action="append", metavar="KEY=VALUE", help="override a scenario value (repeatable)")
    p.add_argument("--seed", type=int, help="seed (overrides scenario.seed)")
    p.add_argument("--duration", type=float, metavar="S", help="stop after S seconds (default: run until interrupted)")
    p.add_argument(
        "--trace",
        metavar="FILE.jsonl",
        help="write every frame sent or heard to FILE (ionotrail decode --trace reads it)",
    )
    p.add_argument(
        "--keys",
        metavar="FILE",
        help="key file (ionotrail keys; readable by its owner only): the terminal's root key for serve, the site secret "
        "for master; without it, commands are refused (serve) or cannot be sent (master)",
    )
    p.add_argument(
        "--authenticate-data",
        action="store_true",
        help="authenticate uplink data (docs/keys.md; 14 bytes more per fragment): serve tags every fragment, master "
        "refuses untagged ones; needs --keys (the same as --set link.authenticate_data=true)",
    )


def add_parser(commands: Any) -> None:
    p = commands.add_parser(
        "serve",
        help="run the reference terminal on a radio modem",
        description=(
            "Run the reference terminal (the demo river gauge's reports, the burst link, the\n"
            "adaptive fragment policy) on a modem over a serial line, in real time, until\n"
            "interrupted or --duration.  Prints a summary line at the end."
        ),
        epilog=SAFETY,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    _common(p)
    p.add_argument(
        "--policy", default="adaptive", metavar="NAME", help="fragment policy: adaptive, fixed-N or stop-and-wait"
    )
    p.add_argument("--every", type=float, metavar="S", help="report every S seconds (default: every 15 minutes)")
    p.add_argument(
        "--outbox",
        metavar="FILE",
        help="keep the outbox in this SQLite file, so that a power cut loses no accepted message (default: in memory)",
    )
    p.add_argument(
        "--accepted",
        metavar="FILE.jsonl",
        help="append one JSON line to FILE for every message accepted into the outbox",
    )
    p.set_defaults(handler=run_serve)
    p = commands.add_parser(
        "master",
        help="run the master station on a radio modem",
        description=(
            "Run the master station (probes, polls, acknowledgements, reassembly) on a modem\n"
            "over a serial line, in real time, until interrupted or --duration.  Every\n"
            "delivered message goes to --deliveries as one JSON line."
        ),
        epilog=SAFETY,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    _common(p)
    p.add_argument(
        "--deliveries", metavar="FILE.jsonl", help="write every delivered message to FILE, one JSON object a line"
    )
    p.add_argument(
        "--rotate-keys",
        action="store_true",
        help="move the scenario's terminal to its next key epoch over the air (needs --keys and --state; survives a "
        "restart of either end mid-rotation; docs/keys.md)",
    )
    p.add_argument(
        "--state",
        metavar="FILE",
        help=(
            "keep the master's duplicate windows, partial messages and deliveries in this SQLite file, so that a restart "
            "neither delivers twice nor forgets (default: in memory); with --deliveries, the file is caught up from it "
            "and appended to, never rewritten"
        ),
    )
    p.set_defaults(handler=run_master)


def _check(args: argparse.Namespace) -> Any:
    from ionotrail.terminal.errors import UsageError
    from ionotrail.terminal.modem.dialects import dialect

    if args.duration is not None and not (math.isfinite(args.duration) and args.duration > 0):
        raise UserError(f"--duration {args.duration:g}: expected a positive number of seconds")
    if getattr(args, "every", None) is not None and not (math.isfinite(args.every) and args.every > 0):
        raise UserError(f"--every {args.every:g}: expected a positive number of seconds")
    try:
        dialect(args.dialect)
    except UsageError as exc:
        raise UserError(f"--dialect {args.dialect}: {exc}") from None
    scenario = load_scenario(args)
    if getattr(args, "authenticate_data", False):
        scenario = dataclasses.replace(scenario, authenticate_data=True)
    if scenario.authenticate_data and not args.keys:
        where = "--authenticate-data" if getattr(args, "authenticate_data", False) else "link.authenticate_data"
        raise UserError(f"{where}: authenticated data needs keys; give --keys FILE (ionotrail keys)")
    return scenario


async def _until(duration: float | None) -> None:
    """Until ``duration`` has passed, or Ctrl-C or SIGTERM (then the run still ends with its summary)."""
    loop = asyncio.get_running_loop()
    stop = asyncio.Event()
    for sig in (signal.SIGINT, signal.SIGTERM):
        loop.add_signal_handler(sig, stop.set)
    try:
        await asyncio.wait_for(stop.wait(), duration)
    except TimeoutError:
        pass
    finally:
        for sig in (signal.SIGINT, signal.SIGTERM):
            loop.remove_signal_handler(sig)


def open_output(option: str, name: str | None, *, append: bool = False) -> IO[str] | None:
    """An output file opened before the run, so that a bad path fails at once."""
    if name is None:
        return None
    try:
        return open(name, "a" if append else "w", encoding="utf-8")
    except OSError as exc:
        raise UserError(f"{option} {name}: {exc.strerror}") from None


def load_keys(name: str | None, role: str, terminal: int) -> Any:
    """The key file for ``role``: a terminal root for ``terminal``, or the site secret."""
    from ionotrail.harness.cli.keys import load_key_file
    from ionotrail.terminal.auth.keys import SiteSecret, TerminalRoot

    if name is None:
        return None
    key = load_key_file(name)
    if role == "terminal":
        if not isinstance(key, TerminalRoot):
            raise UserError(f"--keys {name}: a site secret; a terminal takes its own root key (ionotrail keys provision)")
        if key.terminal != terminal:
            raise UserError(f"--keys {name}: the key of terminal {key.terminal:#06x}, and this terminal is {terminal:#06x}")
    elif not isinstance(key, SiteSecret):
        raise UserError(f"--keys {name}: a terminal's root key; the master takes the site secret (ionotrail keys new-site)")
    return key


def open_store(option: str, name: str | None, *, private: bool = False) -> Any:
    """The SQLite store named by ``option``, or one in memory; ``private``: it
    will hold key material, so others must not be able to read it."""
    from ionotrail.terminal.errors import UsageError
    from ionotrail.terminal.stores.memory import MemoryStore
    from ionotrail.terminal.stores.sqlite import SqliteStore

    if name is None:
        return MemoryStore()
    try:
        return SqliteStore(name, private=private)
    except UsageError as exc:
        raise UserError(f"{option} {name}: {exc}".replace(f"{name}: {name}: ", f"{name}: ")) from None
    except OSError as exc:
        raise UserError(f"{option} {name}: {exc.strerror}") from None


def catch_up(out: IO[str], name: str, store: Any, station: Any) -> None:
    """Append to the deliveries file what the state's log holds beyond it.

    The file is written only from the log, one line per entry in order, so its
    complete lines are the entries exported; a line a crash cut short is
    dropped and written again."""
    from ionotrail.terminal.errors import DecodeError
    from ionotrail.terminal.limits import MAX_DELIVERY_EXPORT
    from ionotrail.terminal.outbox.journal import parse_delivery

    out.flush()
    with open(name, "rb+") as raw:
        data = raw.read()
        complete = data.rfind(b"\n") + 1
        if complete < len(data):
            raw.truncate(complete)
        exported = data[:complete].count(b"\n")
    out.seek(0, 2)
    try:
        while True:
            entries = store.log_after(exported, MAX_DELIVERY_EXPORT)
            if not entries:
                return
            for position, entry in entries:
                station.export(parse_delivery(position, entry))
                exported = position
            out.flush()
    except DecodeError as exc:
        raise UserError(f"--state: {exc}") from None


def traced(port: Any, trace: IO[str] | None, station: str, origin: float) -> Any:
    """``port``, or a port that also writes every frame to ``trace``."""
    from ionotrail.harness.reports.trace import TraceWriter, TracingPort

    if trace is None:
        return port
    return TracingPort(port, TraceWriter(trace, asyncio.get_running_loop().time, origin), station)


async def _open(port: Any, url: str) -> None:
    from ionotrail.terminal.errors import UsageError

    try:
        await port.open()
    except (OSError, UsageError) as exc:
        raise UserError(f"--port {url}: cannot open: {exc}") from None


def run_serve(args: argparse.Namespace) -> int:
    from ionotrail.harness.demo.gauge import REPORT_INTERVAL_S
    from ionotrail.harness.runners.stations import serial_port, terminal_station
    from ionotrail.terminal.errors import DecodeError, UsageError
    from ionotrail.terminal.service import MessageAbandoned, MessageQueued, MessagesRestored
    from ionotrail.terminal.wire.crc import crc32c

    scenario = _check(args)
    if args.keys and not args.outbox:
        raise UserError(
            f"--keys {args.keys}: give --outbox FILE too; without a durable store a reboot forgets which commands ran, "
            "and a recorded command could be replayed"
        )
    root = load_keys(args.keys, "terminal", scenario.terminal_address)
    store = open_store("--outbox", args.outbox, private=bool(args.keys))
    trace = open_output("--trace", args.trace)
    accepted = open_output("--accepted", args.accepted, append=True)
    counts = {"queued": 0, "abandoned": 0, "restored": 0}

    def observe(_now: float, event: object) -> None:
        if isinstance(event, MessageQueued):
            counts["queued"] += 1
            if accepted is not None:
                line = {
                    "message_id": event.message_id,
                    "size": len(event.payload),
                    "crc32c": f"0x{crc32c(event.payload):08x}",
                }
                accepted.write(json.dumps(line | {"priority": event.priority.name.lower()}) + "\n")
                accepted.flush()
        elif isinstance(event, MessagesRestored):
            counts["restored"] = event.count
        elif isinstance(event, MessageAbandoned):
            counts["abandoned"] += 1

    async def main() -> str:
        loop = asyncio.get_running_loop()
        port = serial_port(args.port, args.dialect, scenario, "terminal")
        await _open(port, args.port)
        print(
            f"terminal {scenario.terminal_address:#06x} on {args.port} ({args.dialect}); Ctrl-C to stop",
            file=sys.stderr,
        )
        every = args.every if args.every is not None else REPORT_INTERVAL_S
        origin = loop.time()
        service = terminal_station(
            traced(port, trace, "terminal", origin),
            scenario,
            policy=args.policy,
            report_every_s=every,
            origin=origin,
            observer=observe,
            store=store,
            root=root,
        )
        run = asyncio.create_task(service.run())
        try:
            await _until(args.duration)
        finally:
            service.stop()
            try:
                await run
            except (DecodeError, UsageError) as exc:  # what the store kept cannot be taken up
                raise UserError(f"--outbox {args.outbox}: {exc}") from None
            finally:
                await port.close()
        sender, c, o = service.link.sender.counters, port.counters, service.outbox.counters
        per_message = f"{service.store.writes / o.accepted:.2f}" if o.accepted else "-"
        return (
            f"terminal: {counts['queued']} messages queued ({counts['restored']} kept from before), {sender.acknowledged} acknowledged, "
            f"{service.link.sender.pending} pending, {counts['abandoned']} abandoned; {service.link.counters.bursts} bursts, "
            f"{service.link.counters.fragments_sent} fragments; outbox writes {service.store.writes} (every commit, key state too; {per_message} per message accepted); "
            f"modem resets {c.resets}, reconnects {c.reconnects}, line errors {sum(c.line_errors.values())}"
        )

    try:
        print(_run(main()))
    finally:
        for stream in (trace, accepted):
            if stream is not None:
                stream.close()
    return 0


def run_master(args: argparse.Namespace) -> int:
    from ionotrail.harness.emulators.master import json_lines_sink
    from ionotrail.harness.runners.stations import master_station, serial_port
    from ionotrail.terminal.errors import DecodeError, UsageError

    scenario = _check(args)
    if args.keys and not args.state:
        raise UserError(
            f"--keys {args.keys}: give --state FILE too; without it a restarted master would give out command ids "
            "and counters again"
        )
    if args.rotate_keys and not args.keys:
        raise UserError("--rotate-keys: the rotation is signed with the site secret; give --keys FILE and --state FILE")
    site = load_keys(args.keys, "master", scenario.terminal_address)
    store = open_store("--state", args.state) if args.state else None
    out = open_output("--deliveries", args.deliveries, append=args.state is not None)
    trace = open_output("--trace", args.trace)

    async def main() -> str:
        loop = asyncio.get_running_loop()
        port = serial_port(args.port, args.dialect, scenario, "master")
        await _open(port, args.port)
        print(f"master {scenario.master_address} on {args.port} ({args.dialect}); Ctrl-C to stop", file=sys.stderr)
        sink = json_lines_sink(out) if out is not None else None
        origin = loop.time()
        station = master_station(
            traced(port, trace, "master", origin), scenario, origin=origin, sink=sink, store=store, site=site,
            on_store_trouble=lambda line: print(f"master: --state {args.state}: {line}", file=sys.stderr, flush=True),
        )  # fmt: skip
        if out is not None and args.state is not None:
            catch_up(out, args.deliveries, store, station)
        try:
            station.start()
        except (DecodeError, UsageError) as exc:  # what the state file kept cannot be taken up
            raise UserError(f"--state {args.state}: {exc}") from None
        terminal = scenario.terminal_address
        if args.rotate_keys:
            auth = station.endpoint.auth
            if not auth.rotating(terminal):  # (a rotation cut short by a restart is already on its way again)
                station.rotate_keys(terminal)
            print(f"rotating the keys of terminal {terminal:#06x} to epoch {auth.epoch(terminal) + 1}", file=sys.stderr)
        try:
            await _until(args.duration)
        finally:
            await station.stop()
            await port.close()
        c, m = port.counters, station.counters
        kept = (
            f" ({station.restored[0]} windows and {station.restored[1]} partial messages kept from before)"
            if args.state
            else ""
        )
        auth = station.endpoint.auth
        keys = (
            f"; keys of {terminal:#06x} at epoch {auth.epoch(terminal)}{' (rotation under way)' if auth.rotating(terminal) else ''}"
            if auth is not None
            else ""
        )
        refused = f"; {station.store_failures} commits refused by the store" if station.store_failures else ""
        return (
            f"master: {m.deliveries} messages delivered{kept}, {m.fragments} fragments, {m.crc_failed} CRC failures{keys}{refused}; "
            f"modem resets {c.resets}, reconnects {c.reconnects}, line errors {sum(c.line_errors.values())}"
        )

    try:
        print(_run(main()))
    finally:
        for stream in (out, trace):
            if stream is not None:
                stream.close()
    return 0


def _run(coroutine: Any) -> str:
    return str(asyncio.run(coroutine))
