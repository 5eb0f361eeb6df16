"""A soak: the reference terminal and the master on two real modems, in wall-clock time.

Both stations run on one event loop, each on its own serial port (real
modems, or the two lines of ``ionotrail emulate``).  The terminal's demo
gauge reports every ``report_every_s``; after ``duration_s`` it stops
reporting and the run waits up to ``drain_s`` for the last messages to be
delivered.  The ledger compares what the terminal queued with what the
master delivered: a message delivered twice is *duplicated*, one neither
delivered nor still pending at the end is *lost*, and so is a reading the
terminal abandoned for want of queue room (counted apart too, as
``messages.abandoned``: the gauge reported faster than the channel carried);
one still pending after the drain is *pending*; a delivery whose bytes the
terminal never queued under its id is *unexpected*.  A clean soak has all
offered messages delivered and every other count zero.  Frames the master hears are binned by reported SNR to give the
frame error rate against SNR.  Resident memory is read at the start and the end.

:data:`SOAK_KEYS` are a contract: scripts and CI read them.
"""

from __future__ import annotations

import asyncio
import dataclasses
import math
import time
from collections.abc import Callable
from pathlib import Path
from typing import IO, Any

from ionotrail.harness.channel.scenario import Scenario
from ionotrail.harness.emulators.master import DeliveryRecord, MasterStation
from ionotrail.harness.reports.trace import TraceWriter, TracingPort
from ionotrail.harness.runners.stations import master_station, serial_port, terminal_station
from ionotrail.terminal.errors import DecodeError, Reason
from ionotrail.terminal.limits import DEFAULT_LIMITS, Limits
from ionotrail.terminal.link.terminal import Arrival
from ionotrail.terminal.ports import Port
from ionotrail.terminal.service import MessageAbandoned, MessageQueued, ServiceEvent
from ionotrail.terminal.wire import decode
from ionotrail.terminal.wire.crc import crc32c

SOAK_KEYS = (
    "messages.offered", "messages.delivered", "messages.lost", "messages.duplicated", "messages.pending",
    "latency_s.p50", "latency_s.p95", "modem.resets", "serial.reconnects", "serial.errors",
    "rss_mb.start", "rss_mb.end",
)  # fmt: skip
SNR_BIN_DB = 3.0
"""Width of the SNR bins of the frame-error table."""
MAX_SNR_BINS = 40
"""Bins kept (frames outside them count in the edge bins): 120 dB of range."""


def rss_mb() -> float:
    """Resident memory of this process, MiB (Linux /proc), NaN where unknown."""
    try:
        for line in Path("/proc/self/status").read_text(encoding="ascii").splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    except OSError:
        pass
    return math.nan


@dataclasses.dataclass
class SoakLedger:
    """What went in at the terminal and came out at the master."""

    # Messages by (16-bit id, CRC-32C of the payload): ids wrap in a long soak, and the
    # payload (which carries its creation time) tells two messages with one id apart.
    offered: dict[tuple[int, int], float] = dataclasses.field(default_factory=dict)  # -> created
    abandoned: int = 0
    delivered: dict[tuple[int, int], DeliveryRecord] = dataclasses.field(default_factory=dict)
    duplicated: int = 0
    unexpected: int = 0
    latencies: list[float] = dataclasses.field(default_factory=list)
    frames_by_snr: dict[int, list[int]] = dataclasses.field(default_factory=dict)  # bin -> [frames, failed]

    def queued(self, _now: float, event: ServiceEvent) -> None:
        if isinstance(event, MessageQueued):
            self.offered[(event.message_id, crc32c(event.payload))] = event.created
        elif isinstance(event, MessageAbandoned):
            self.abandoned += 1

    def delivery(self, record: DeliveryRecord) -> None:
        key = (record.message_id, record.crc32c)
        if key in self.delivered:
            self.duplicated += 1
            return
        if key not in self.offered:  # bytes the terminal never queued under that id
            self.unexpected += 1
            return
        self.delivered[key] = record
        if record.created_s is not None:
            self.latencies.append(record.delivered_s - record.created_s)

    def heard(self, arrival: Arrival) -> None:
        if math.isnan(arrival.snr_db):
            key = MAX_SNR_BINS  # the "unknown" bin (KISS reports no SNR)
        else:
            key = max(0, min(MAX_SNR_BINS - 1, int((arrival.snr_db + 30.0) // SNR_BIN_DB)))
        counts = self.frames_by_snr.setdefault(key, [0, 0])
        counts[0] += 1
        try:
            decode(arrival.frame)
        except DecodeError as error:
            if error.reason is Reason.BAD_CRC:
                counts[1] += 1

    def frame_errors(self) -> tuple[int, int]:
        frames = sum(c[0] for c in self.frames_by_snr.values())
        return frames, sum(c[1] for c in self.frames_by_snr.values())

    def snr_table(self) -> list[dict[str, Any]]:
        rows = []
        for key in sorted(self.frames_by_snr):
            frames, failed = self.frames_by_snr[key]
            low = None if key == MAX_SNR_BINS else -30.0 + key * SNR_BIN_DB
            rows.append({"snr_db_from": low, "snr_db_to": None if low is None else low + SNR_BIN_DB, "frames": frames,
                         "crc_failed": failed, "frame_error_rate": round(failed / frames, 4)})  # fmt: skip
        return rows


def _percentile(values: list[float], q: float) -> float | None:
    if not values:
        return None
    ordered = sorted(values)
    return round(ordered[min(len(ordered) - 1, int(q * len(ordered)))], 3)


async def soak(
    scenario: Scenario,
    terminal_url: str,
    master_url: str,
    *,
    duration_s: float,
    drain_s: float = 300.0,
    report_every_s: float = 60.0,
    dialect_name: str = "ionotrail",
    policy: str = "adaptive",
    progress: Callable[[dict[str, Any]], None] | None = None,
    progress_every_s: float = 5.0,
    limits: Limits = DEFAULT_LIMITS,
    trace: IO[str] | None = None,
) -> dict[str, Any]:
    """Run the soak and return its report (:data:`SOAK_KEYS` and more)."""
    loop = asyncio.get_running_loop()
    rss_start = rss_mb()
    wall_start = time.time()
    origin = loop.time()
    ledger = SoakLedger()
    terminal_port = serial_port(terminal_url, dialect_name, scenario, "terminal")
    master_port = serial_port(master_url, dialect_name, scenario, "master")
    ports = (terminal_port, master_port)
    await terminal_port.open()
    await master_port.open()
    terminal_side: Port = terminal_port
    master_side: Port = master_port
    if trace is not None:
        writer = TraceWriter(trace, loop.time, origin)
        terminal_side, master_side = TracingPort(terminal_port, writer, "terminal"), TracingPort(master_port, writer, "master")
    service = terminal_station(
        terminal_side, scenario, policy=policy, report_every_s=report_every_s, origin=origin, observer=ledger.queued, limits=limits
    )
    master: MasterStation = master_station(master_side, scenario, origin=origin, sink=ledger.delivery, on_arrival=ledger.heard)
    master.start()

    def snapshot(phase: str) -> dict[str, Any]:
        frames, failed = ledger.frame_errors()
        return {
            "phase": phase,
            "elapsed_s": round(loop.time() - origin, 1),
            "offered": len(ledger.offered),
            "delivered": len(ledger.delivered),
            "frame_error_rate": round(failed / frames, 4) if frames else None,
            "resets": sum(p.counters.resets for p in ports),
            "reconnects": sum(p.counters.reconnects for p in ports),
        }

    ticker: asyncio.Task[None] | None = None
    if progress is not None:

        async def tick() -> None:
            while True:
                await asyncio.sleep(progress_every_s)
                progress(snapshot("soak" if loop.time() - origin < duration_s else "drain"))

        ticker = asyncio.create_task(tick())
    run = asyncio.create_task(service.run())
    try:
        await asyncio.sleep(duration_s)
        service.source = _Silent()  # stop reporting; let the queue drain
        drain_end = loop.time() + drain_s
        while service.link.sender.pending and loop.time() < drain_end and not run.done():
            await asyncio.sleep(0.5)
        await asyncio.sleep(min(5.0, max(0.0, drain_end - loop.time())))  # the last acknowledgements
    finally:
        service.stop()
        await run
        if ticker is not None:
            ticker.cancel()
        await master.stop()
        for port in ports:
            await port.close()
    pending_ids = {m[0] for m in service.link.sender.outstanding()}
    undelivered = [key for key in ledger.offered if key not in ledger.delivered]
    pending = [key for key in undelivered if key[0] in pending_ids]
    lost = ledger.abandoned + len(undelivered) - len(pending)
    frames, failed = ledger.frame_errors()
    errors: dict[str, int] = {}
    for port in ports:
        for reason, n in port.counters.line_errors.items():
            errors[reason] = errors.get(reason, 0) + n
    return {
        "scenario": scenario.name,
        "terminal": terminal_url,
        "master": master_url,
        "dialect": dialect_name,
        "started_unix": round(wall_start, 3),
        "wall_seconds": round(loop.time() - origin, 1),
        "messages": {
            "offered": len(ledger.offered) + ledger.abandoned,
            "delivered": len(ledger.delivered),
            "lost": lost,
            "duplicated": ledger.duplicated,
            "pending": len(pending),
            "abandoned": ledger.abandoned,
            "unexpected": ledger.unexpected,
        },
        "latency_s": {"p50": _percentile(ledger.latencies, 0.5), "p95": _percentile(ledger.latencies, 0.95),
                      "max": _percentile(ledger.latencies, 1.0)},
        "frames": {"heard_by_master": frames, "crc_failed": failed, "frame_error_rate": round(failed / frames, 4) if frames else None,
                   "by_snr": ledger.snr_table()},
        "modem": {"resets": sum(p.counters.resets for p in ports)},
        "serial": {
            "reconnects": sum(p.counters.reconnects for p in ports),
            "errors": sum(errors.values()),
            "errors_by_kind": errors,
            "frames_dropped_offline": sum(p.counters.frames_dropped_offline for p in ports),
        },
        "rss_mb": {"start": round(rss_start, 1), "end": round(rss_mb(), 1)},
    }


class _Silent:
    """A message source with nothing more to say (the drain after a soak)."""

    def next_due(self) -> float | None:
        return None

    def take(self, now: float, room: int) -> list[tuple[bytes, Any]]:
        return []

    def command(self, opcode: int, arguments: bytes) -> tuple[Any, bytes]:
        from ionotrail.terminal.wire.formats import ReplyStatus

        return ReplyStatus.REFUSED, b""
