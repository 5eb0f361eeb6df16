"""The main job: a terminal, a master and the channel between them, for a period.

:func:`simulate` generates the scenario's trails, joins a master emulator and
a terminal service through :class:`~ionotrail.harness.emulators.air.Air`, runs them on a
virtual-time loop (or, for the equivalence test, in real time), and reports
what a link engineer asks: how many messages were offered, delivered,
pending and abandoned, the latency distribution, how much of the channel's
capacity the traffic used, and what went over the air.  The report's keys
are a contract (scripts and CI read them); see :data:`REPORT_KEYS`.
"""

from __future__ import annotations

import asyncio
import dataclasses
import math
import random
import time
from collections.abc import Callable, Sequence
from typing import IO, Any

import numpy as np
from ionotrail.harness.channel import oracle
from ionotrail.harness.channel.model import CELL_S, Channel, Trails, TrailSet, last_live
from ionotrail.harness.channel.scenario import Scenario
from ionotrail.harness.demo.gauge import Backlog, DemoGauge
from ionotrail.harness.emulators.air import Air
from ionotrail.harness.emulators.master import DeliveryRecord, MasterStation
from ionotrail.harness.energy.meter import PRIORITY_NAMES, EnergyMeter, EnergyTimeline, scheduler_for
from ionotrail.harness.reports.trace import TraceWriter, TracingPort
from ionotrail.harness.runners.keying import simulated_site, simulated_terminal
from ionotrail.harness.runners.vtime import VirtualTimeLoop, raise_callback_errors
from ionotrail.terminal.delivery.sender import MessageAcknowledged, MessageRefused, Priority, Sender
from ionotrail.terminal.errors import Reason
from ionotrail.terminal.limits import DEFAULT_LIMITS, Limits
from ionotrail.terminal.link.gate import UplinkGate
from ionotrail.terminal.link.policy import Adaptive, by_name
from ionotrail.terminal.link.terminal import BurstEnded, BurstStarted, Duplex, Link
from ionotrail.terminal.outbox.store import Store
from ionotrail.terminal.ports import Port
from ionotrail.terminal.power.duty import DutyCycle
from ionotrail.terminal.power.loads import LOAD_NAMES
from ionotrail.terminal.service import (
    MessageAbandoned,
    MessageEvicted,
    MessageQueued,
    MessageSource,
    ServiceEvent,
    TerminalService,
)
from ionotrail.terminal.wire.crc import crc32c
from ionotrail.terminal.wire.frames import TAGGED_OVERHEAD_BYTES

FRAME_REFUSALS = (
    Reason.TRUNCATED, Reason.TOO_LONG, Reason.UNSUPPORTED_VERSION, Reason.UNKNOWN_TYPE, Reason.BAD_LENGTH, Reason.BAD_FIELD,
)  # fmt: skip
"""Why the air-frame decoder refuses a frame, besides a CRC failure (reported apart)."""
REPORT_KEYS = (
    "scenario", "seed", "policy", "sim_seconds", "wall_seconds", "speedup",
    "messages.offered", "messages.delivered", "messages.duplicates_delivered", "messages.pending",
    "messages.abandoned", "messages.abandoned_reasons",
    "latency_s.p50", "latency_s.p95", "latency_s.p99", "latency_s.max",
    "bits.payload_delivered", "bits.capacity_bound", "bits.oracle_bound", "utilisation",
    "trails.total", "trails.used", "frames.sent", "frames.received", "frames.crc_failed",
    *(f"frames.refused.{r.value}" for r in FRAME_REFUSALS),
    "latency_s.alarm.p50", "latency_s.alarm.p95", "latency_s.alarm.max",
    "latency_s.routine.p50", "latency_s.routine.p95", "latency_s.routine.max",
    "messages.deadlines_missed.alarm", "messages.deadlines_missed.routine",
    "energy.harvested_wh", *(f"energy.consumed_wh.{name}" for name in LOAD_NAMES), "energy.soc_min", "energy.soc_final",
    "energy.hours_below_reserve", "energy.listen_hours", "energy.tx_seconds", "energy.wasted_tx_seconds",
    "energy.uplink_backoffs", "energy.degradation",
    "outbox.writes", "outbox.writes_per_message", "outbox.counter_writes", "outbox.range_updates",
)  # fmt: skip
PROGRESS_EVERY_S = 600.0  # simulated seconds between progress reports
BOUND_WINDOW_S = CELL_S
"""The bounds are planned six hours at a time: a summer window's openings and
their bytes, some 700 of them, are all that is held at once."""
SEGMENT_MARGIN_S = 3600.0
"""The oracle plans a window's openings on its trails and an hour either side (see :func:`period_figures`)."""


@dataclasses.dataclass
class Timeline:
    """What the plot draws; recorded only when asked for (it grows with the run)."""

    bursts: list[tuple[float, float, float]] = dataclasses.field(default_factory=list)  # start, end, probe Eb/N0 dB
    queue: list[tuple[float, int]] = dataclasses.field(default_factory=list)  # time, messages pending
    openings: list[tuple[float, float, float]] = dataclasses.field(default_factory=list)  # trail start, peak Eb/N0 dB, open s (uplink)
    energy: EnergyTimeline = dataclasses.field(default_factory=EnergyTimeline)


@dataclasses.dataclass
class Simulation:
    report: dict[str, Any]
    deliveries: list[DeliveryRecord]
    timeline: Timeline | None
    link: Link
    master: MasterStation
    air: Air
    meter: EnergyMeter


class _Ledger:
    """Follows every offered message from the terminal's side, to check the
    master's deliveries against: nothing lost, nothing twice."""

    def __init__(self, sender: Sender, timeline: Timeline | None) -> None:
        self.sender = sender
        self.timeline = timeline
        self.offered = 0
        self.abandoned: dict[str, int] = {}
        self.in_sender: dict[int, int] = {}  # wire id -> CRC-32C of the payload, while queued
        self.queued: dict[int, tuple[Priority, float]] = {}  # wire id -> (priority, created), while queued
        self.abandoned_by_priority: dict[Priority, int] = {p: 0 for p in Priority}
        self.burst_start: tuple[float, float] | None = None
        self.origin = 0.0  # the loop time of the run's start

    def observe(self, now: float, event: ServiceEvent) -> None:
        if isinstance(event, MessageQueued):
            self.offered += 1
            self.in_sender[event.message_id] = crc32c(event.payload)
            self.queued[event.message_id] = (event.priority, event.created)
        elif isinstance(event, MessageAbandoned):
            self.offered += 1
            self.abandoned[event.reason] = self.abandoned.get(event.reason, 0) + 1
            self.abandoned_by_priority[event.priority] += 1
        elif isinstance(event, MessageEvicted):
            self.in_sender.pop(event.message_id, None)
            priority, _ = self.queued.pop(event.message_id, (Priority.ROUTINE, 0.0))
            self.abandoned["evicted_for_alarm"] = self.abandoned.get("evicted_for_alarm", 0) + 1
            self.abandoned_by_priority[priority] += 1
        elif isinstance(event, MessageAcknowledged):
            self.in_sender.pop(event.message_id, None)
            self.queued.pop(event.message_id, None)
        elif isinstance(event, MessageRefused):
            self.in_sender.pop(event.message_id, None)
            priority, _ = self.queued.pop(event.message_id, (Priority.ROUTINE, 0.0))
            self.abandoned["refused"] = self.abandoned.get("refused", 0) + 1
            self.abandoned_by_priority[priority] += 1
        elif self.timeline is not None and isinstance(event, BurstStarted):
            self.burst_start = (event.time, event.snr_db)
        elif self.timeline is not None and isinstance(event, BurstEnded) and self.burst_start is not None:
            self.timeline.bursts.append((self.burst_start[0], event.time, self.burst_start[1]))
            self.burst_start = None
        if self.timeline is not None and isinstance(event, (MessageQueued, MessageAcknowledged, MessageRefused, MessageAbandoned)):
            self.timeline.queue.append((now, self.sender.pending))


def _percentile(values: list[float], q: float) -> float | None:
    """Nearest-rank percentile (the smallest value with at least q of the data at or below it)."""
    if not values:
        return None
    ordered = sorted(values)
    rank = max(1, math.ceil(q * len(ordered)))
    return round(ordered[rank - 1], 3)


def make_source(kind: str, scenario: Scenario, backlog_size: int = 1000, origin: float = 0.0) -> MessageSource:
    """A built-in message source whose clock reads loop time; ``origin`` is the
    loop time of the scenario's start."""
    epoch = scenario.start.timestamp() - origin
    if kind == "demo":
        return DemoGauge(random.Random(f"gauge-{scenario.seed}"), epoch_unix=epoch, start=origin)
    if kind == "backlog":
        return Backlog(backlog_size, epoch_unix=epoch, start=origin)
    raise ValueError(f"unknown source {kind!r}; expected demo or backlog")


def simulate(
    scenario: Scenario,
    policy: str = "adaptive",
    *,
    source: str | MessageSource = "demo",
    backlog_size: int = 1000,
    seconds: float | None = None,
    configure_air: Callable[[Air], None] | None = None,
    master_commands: Sequence[tuple[int, int, bytes]] = (),
    trails: TrailSet | None = None,
    limits: Limits = DEFAULT_LIMITS,
    realtime: bool = False,
    record_timeline: bool = False,
    on_delivery: Callable[[DeliveryRecord], None] | None = None,
    progress: Callable[[float, float, int], None] | None = None,
    trace: IO[str] | None = None,
    lazy_probes: bool = True,
    bound_progress: Callable[[float, float], None] | None = None,
    power_policy: str | None = None,
    uplink_backoff: bool | None = None,
    bounds: bool = True,
    master_store: Store | None = None,
) -> Simulation:
    """Run ``scenario`` for its whole period (or ``seconds``); ``trails`` may be
    passed to reuse a realisation (the benchmark runs every policy on the same
    one) or to give hand-made openings; ``source`` is ``"demo"``, ``"backlog"``
    or any :class:`MessageSource`; ``configure_air`` may install fault hooks;
    ``master_commands`` are (terminal, opcode, arguments) the master sends from the start;
    ``trace`` receives every frame either station sent or heard (:mod:`~ionotrail.harness.reports.trace`);
    ``bound_progress(done_s, total_s)`` hears the pass over the period that
    computes the bounds after the run (:func:`period_figures`);
    ``lazy_probes`` lets the air reckon in bulk the probes the idle terminal would
    ignore (:mod:`~ionotrail.harness.emulators.air`; off only to check that it changes nothing);
    ``power_policy`` and ``uplink_backoff`` override the scenario's power settings;
    ``bounds=False`` skips the pass that computes the channel's bounds after the
    run (the report's trail count, capacity and oracle bounds and utilisation
    are then None: for comparisons that do not use them);
    ``master_store`` gives the master a durable store, as ``ionotrail master --state`` does.

    Energy is part of every run: the terminal's receiver is switched by its
    power scheduler, its battery integrated by an
    :class:`~ionotrail.harness.energy.meter.EnergyMeter`, and the report's
    ``energy`` section says where the energy went."""
    wall_start = time.perf_counter()
    duration = scenario.duration_s if seconds is None else float(seconds)
    if trails is None:
        trails = TrailSet(scenario)
    channel = Channel(trails)
    limits = dataclasses.replace(limits, turnaround=scenario.turnaround_s, burst_silence=scenario.burst_silence_s)
    timeline = Timeline() if record_timeline else None
    fragment_policy = by_name(policy, scenario.bit_rate, tau_scale=(scenario.down_mhz / scenario.up_mhz) ** 2)
    if scenario.authenticate_data and isinstance(fragment_policy, Adaptive):  # sized for a tagged fragment's overhead
        fragment_policy.overhead_bits = 8 * TAGGED_OVERHEAD_BYTES
    sender = Sender(scenario.terminal_address, scenario.master_address, limits=limits)
    e = scenario.energy
    gate = UplinkGate() if (e.uplink_backoff if uplink_backoff is None else uplink_backoff) else None
    duty = DutyCycle(e.tx_duty_limit, e.tx_duty_window_s) if e.tx_duty_limit < 1 else None
    power_name = power_policy or e.policy
    link = Link(
        sender, fragment_policy, bit_rate=scenario.bit_rate, duplex=Duplex(scenario.duplex), limits=limits, gate=gate, duty=duty,
        auth=simulated_terminal(scenario.seed, scenario.terminal_address), authenticate_data=scenario.authenticate_data,
    )  # fmt: skip
    ledger = _Ledger(sender, timeline)
    deliveries: list[DeliveryRecord] = []

    def delivered(record: DeliveryRecord) -> None:
        deliveries.append(record)
        if on_delivery is not None:
            on_delivery(record)

    async def main() -> tuple[Air, MasterStation, EnergyMeter]:
        loop = asyncio.get_running_loop()
        origin = loop.time()
        meter = EnergyMeter(scenario, origin, timeline=timeline.energy if timeline is not None else None)
        ledger.origin = origin
        scheduler = scheduler_for(scenario, scenario.start.timestamp() - origin, power_name)
        air = Air(channel, seed=scenario.seed, half_duplex=scenario.duplex == "half", origin=origin, oscillator_ppm=scenario.oscillator_ppm)
        if lazy_probes and trace is None:
            air.idle_terminal = link
        if configure_air is not None:
            configure_air(air)
        terminal_port: Port = air.terminal
        master_port: Port = air.master
        if trace is not None:
            writer = TraceWriter(trace, loop.time, origin)
            terminal_port, master_port = TracingPort(air.terminal, writer, "terminal"), TracingPort(air.master, writer, "master")
        master = MasterStation(
            master_port,
            scenario.master_address,
            limits=limits,
            probe_interval=scenario.probe_interval_s,
            epoch_unix=scenario.start.timestamp(),
            origin=origin,
            sink=delivered,
            site=simulated_site(scenario.seed),
            require_data_auth=scenario.authenticate_data,
            store=master_store,
        )
        app = make_source(source, scenario, backlog_size, origin) if isinstance(source, str) else source

        def observe(now: float, event: ServiceEvent) -> None:
            ledger.observe(now, event)
            meter.observe(now, event)

        service = TerminalService(link, terminal_port, app, observer=observe, power=scheduler, gauge=meter.gauge, forecast=meter.forecast)
        meter.loop, meter.alert = loop, service.gauge_alert
        master.start()
        for terminal, opcode, arguments in master_commands:
            master.command(terminal, opcode, arguments)
        end = origin + duration
        ticker = None
        if progress is not None:

            def tick() -> None:
                nonlocal ticker
                progress(loop.time() - origin, duration, len(deliveries))
                if loop.time() + PROGRESS_EVERY_S < end:
                    ticker = loop.call_at(loop.time() + PROGRESS_EVERY_S, tick)

            ticker = loop.call_at(origin + PROGRESS_EVERY_S, tick)
        await service.run(until=end)
        meter.finish(loop.time())
        if ticker is not None:
            ticker.cancel()
        await master.stop()
        if progress is not None:
            progress(duration, duration, len(deliveries))
        return air, master, meter, service

    if realtime:
        air, master, meter, service = asyncio.run(raise_callback_errors(main()))
    else:
        with asyncio.Runner(loop_factory=VirtualTimeLoop) as runner:
            air, master, meter, service = runner.run(raise_callback_errors(main()))
    wall = time.perf_counter() - wall_start
    if timeline is not None and trails.trails is not None:
        tr = trails.trails
        up = tr.open_s["up"] > 0
        peak_db = 10 * np.log10(np.maximum(tr.peak_ebn0["up"][up], 1e-12))
        timeline.openings = list(zip(tr.t[up].tolist(), peak_db.tolist(), tr.open_s["up"][up].tolist(), strict=True))
    figures = period_figures(trails, until=duration, limits=limits, progress=bound_progress) if bounds else None
    report = _report(scenario, policy, figures, air, master, link, ledger, deliveries, wall, duration)
    energy = meter.section(wasted_tx_s=air.counters.wasted_airtime_s["up"], backoffs=gate.backoffs if gate else 0,
                           duty_refusals=duty.refusals if duty else 0)  # fmt: skip
    energy["policy"] = power_name
    report["energy"] = energy
    o = service.outbox.counters
    report["outbox"] = {
        "writes": service.store.writes,
        "writes_per_message": round(service.store.writes / o.accepted, 3) if o.accepted else None,
        "counter_writes": o.counter_writes,
        "range_updates": o.range_updates,
    }
    _deadlines(report, scenario, ledger, deliveries, link, duration)
    return Simulation(report, deliveries, timeline, link, master, air, meter)


def _unique(deliveries: list[DeliveryRecord]) -> list[DeliveryRecord]:
    """Each delivered message once (the first delivery of any duplicate)."""
    seen: dict[tuple[int, int, int, float | None], int] = {}
    for record in deliveries:
        key = (record.terminal, record.message_id, record.crc32c, record.created_s)
        seen[key] = seen.get(key, 0) + 1
    return [r for r in deliveries if seen.pop((r.terminal, r.message_id, r.crc32c, r.created_s), 0)]


def _deadlines(report: dict[str, Any], scenario: Scenario, ledger: _Ledger, deliveries: list[DeliveryRecord], link: Link, end: float) -> None:
    """Latency by priority, and deadlines missed: delivered late, still waiting
    (not delivered) past the deadline at the end, or abandoned.  Each message
    counts once: duplicates are left out, and a message the master delivered
    whose final acknowledgement the terminal has not heard is delivered."""
    e = scenario.energy
    deadline = {"alarm": e.alarm_deadline_s, "routine": e.routine_deadline_s}
    latencies: dict[str, list[float]] = {"alarm": [], "routine": []}
    unique = _unique(deliveries)
    for r in unique:
        if r.created_s is not None:
            latencies[r.priority].append(r.delivered_s - r.created_s)
    missed = {name: sum(1 for v in values if v > deadline[name]) for name, values in latencies.items()}
    delivered = {(r.message_id, r.crc32c) for r in unique}
    pending = {wire_id for wire_id, *_ in link.sender.outstanding()}
    for wire_id, (priority, created) in ledger.queued.items():
        name = PRIORITY_NAMES[priority]
        waiting = wire_id in pending and (wire_id, ledger.in_sender.get(wire_id)) not in delivered
        if waiting and end - (created - ledger.origin) > deadline[name]:
            missed[name] += 1
    for priority, count in ledger.abandoned_by_priority.items():
        missed[PRIORITY_NAMES[priority]] += count
    for name, values in latencies.items():
        report["latency_s"][name] = {
            "p50": _percentile(values, 0.50),
            "p95": _percentile(values, 0.95),
            "p99": _percentile(values, 0.99),
            "max": round(max(values), 3) if values else None,
        }
    report["messages"]["deadlines_missed"] = missed


@dataclasses.dataclass(frozen=True)
class PeriodFigures:
    """What the report says of the channel over the run's period, apart from the run."""

    trails: int  # kept (usable) trails that start before the period's end
    capacity_bits: float  # the open-time bound, uplink
    oracle_bits: float  # the oracle bound, uplink


def period_figures(trail_set: TrailSet, *, until: float, limits: Limits = DEFAULT_LIMITS,
                   progress: Callable[[float, float], None] | None = None) -> PeriodFigures:  # fmt: skip
    """The trails, the open-time bound and the oracle bound of [0, until), in
    one pass over the trail set's windows (memory: three windows).

    Openings are planned window by window: window w's are those whose
    (joined) start lies in it, planned on the trails of windows w - 1 to
    w + 1, so that trails still live from the day before and openings that
    run on past midnight are seen whole.  ``progress(done_s, until)`` hears
    each window as it is done."""
    turnaround, silence, max_payload = limits.turnaround, limits.burst_silence, limits.max_fragment_payload
    if trail_set.window_count > 1 and trail_set.window_s > BOUND_WINDOW_S:
        trail_set = trail_set.with_window(BOUND_WINDOW_S)  # the same trails (cells are keyed), fewer at a time
    count, capacity, bound = 0, 0.0, 0.0
    reach = -math.inf  # the latest end of an uplink opening so far (the union runs across windows)
    last = trail_set.window_count - 1
    held: dict[int, Trails] = {}
    byte_s = 8.0 / trail_set.directions["up"].bit_rate
    for w in range(last + 1):
        lo, hi = trail_set.window_bounds(w)
        if lo >= until:
            break
        for k in range(max(0, w - 1), min(last, w + 1) + 1):
            if k not in held:
                held[k] = trail_set.window(k)
        for k in [k for k in held if k < w - 1]:
            del held[k]
        own = held[w]
        own = own.select(own.t < until) if hi > until else own
        count += len(own)
        if len(own):
            end = own.t + own.open_s["up"]
            earlier = np.maximum.accumulate(np.concatenate([[reach], end[:-1]]))
            capacity += float(np.sum(np.maximum(0.0, end - np.maximum(own.t, earlier))))
            reach = max(reach, float(end.max()))
        nearby = Trails.concatenate([held[k] for k in sorted(held)])
        for margin in (SEGMENT_MARGIN_S, math.inf):
            # The trails of [lo - margin, hi + margin): enough unless a trail lives,
            # or a chain of openings runs on, for longer than the margin (then: all three windows).
            segment = nearby.select((nearby.t >= lo - margin) & (nearby.t < hi + margin)) if margin < math.inf else nearby
            dropped = nearby.select(nearby.t < lo - margin) if margin < math.inf else None
            if dropped is not None and len(dropped) and last_live(dropped) >= lo - silence:
                continue
            horizon = hi + margin if margin < math.inf else trail_set.window_bounds(w + 1)[1] if w < last else math.inf
            plans = []
            for plan in oracle.iter_openings(Channel(trail_set.fixed(segment)), until=until, turnaround=turnaround,
                                             burst_silence=silence, max_payload=max_payload, since=lo):  # fmt: skip
                if plan.start_s - turnaround >= hi:
                    break
                plans.append(plan)
            if plans and plans[-1].start_s + plans[-1].steps * oracle.STEP_BYTES * byte_s > horizon - silence:
                if margin < math.inf:
                    continue
                raise RuntimeError(f"an uplink opening runs on for more than a window from {plans[-1].start_s:.1f} s: its trails are not all held")
            break
        for first in range(0, len(plans), oracle.ORACLE_BATCH):
            bound += float(np.sum(oracle.plan_values(plans[first : first + oracle.ORACLE_BATCH], max_payload=max_payload)))
        del plans
        if progress is not None:
            progress(min(hi, until), until)
    return PeriodFigures(count, capacity * trail_set.scenario.bit_rate, bound)


def _report(scenario: Scenario, policy: str, figures: PeriodFigures | None, air: Air, master: MasterStation, link: Link, ledger: _Ledger,
            deliveries: list[DeliveryRecord], wall: float, sim_seconds: float) -> dict[str, Any]:
    unique = _unique(deliveries)
    duplicates = len(deliveries) - len(unique)
    delivered_ids = {(r.message_id, r.crc32c) for r in unique}
    # Pending is read from the sender's own queue, not from the ledger: a message
    # the sender dropped without a word is then neither pending nor delivered nor
    # abandoned, and the invariant offered = delivered + pending + abandoned fails.
    pending = sum(1 for wire_id, *_ in link.sender.outstanding() if (wire_id, ledger.in_sender.get(wire_id)) not in delivered_ids)
    latencies = [r.delivered_s - r.created_s for r in unique if r.created_s is not None]
    payload_bits = 8 * sum(r.size for r in unique)
    return {
        "scenario": scenario.name,
        "seed": scenario.seed,
        "policy": policy,
        "sim_seconds": sim_seconds,
        "wall_seconds": round(wall, 3),
        "speedup": round(sim_seconds / wall, 1) if wall > 0 else None,
        "messages": {
            "offered": ledger.offered,
            "delivered": len(unique),
            "duplicates_delivered": duplicates,
            "pending": pending,
            "abandoned": sum(ledger.abandoned.values()),
            "abandoned_reasons": dict(sorted(ledger.abandoned.items())),
        },
        "latency_s": {
            "p50": _percentile(latencies, 0.50),
            "p95": _percentile(latencies, 0.95),
            "p99": _percentile(latencies, 0.99),
            "max": round(max(latencies), 3) if latencies else None,
        },
        "bits": {
            "payload_delivered": payload_bits,
            "capacity_bound": round(figures.capacity_bits) if figures else None,
            "oracle_bound": round(figures.oracle_bits) if figures else None,
        },
        # Against the oracle bound, a true one: above 1 only by luck (tests/test_oracle.py).
        "utilisation": round(payload_bits / figures.oracle_bits, 4) if figures and figures.oracle_bits > 0 else None,
        "trails": {"total": figures.trails if figures else None, "used": len(air.used_trails)},
        "frames": {
            "sent": air.counters.frames_sent["up"],
            "received": air.counters.frames_delivered["up"],
            "crc_failed": master.counters.crc_failed,
            "refused": {r.value: master.counters.refused.get(r.value, 0) for r in FRAME_REFUSALS},
        },
        "probes": {
            "emitted_in_openings": air.counters.probes_emitted_in_openings,
            "heard": air.counters.probes_delivered,
        },
        "bursts": link.counters.bursts,
    }


def invariant_holds(report: dict[str, Any]) -> bool:
    m = report["messages"]
    return m["offered"] == m["delivered"] + m["pending"] + m["abandoned"] and m["duplicates_delivered"] == 0
