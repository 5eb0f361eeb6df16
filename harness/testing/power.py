"""A small world for checking a power scheduler: battery, harvest, arrivals, openings.

The model drives any scheduler with the :class:`Decider` interface (ours,
:class:`~ionotrail.terminal.power.scheduler.PowerScheduler`, or a terminal
maker's own behind an adapter) through a list of :class:`Step`: stretches of
constant harvest and temperature, with messages created at a step's start
and openings at given offsets within it.  The receiver listens as the plan
says; an opening heard while listening carries up to ``per_opening``
frames, one message each, alarms first and routine ones only while the
plan allows them, each frame subject to the transmit duty-cycle limit.
The battery is the core's :class:`~ionotrail.terminal.power.battery.Battery`,
integrated exactly; like a fuel gauge with threshold alerts (common
practice, no source), the model asks for a new plan the moment the state
of charge falls through the reserve or conserve threshold, as well as at
the plan's time, after every arrival and after every opening it used.

Everything the properties need is recorded in :class:`ModelRun`: every
interval with its power state, the state of charge at both ends and
whether an alarm was queued; every frame with the state of charge before
it; and the deliveries.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from typing import Protocol

from ionotrail.terminal.delivery.sender import Priority
from ionotrail.terminal.power.battery import Battery, BatterySpec
from ionotrail.terminal.power.duty import DutyCycle
from ionotrail.terminal.power.loads import LoadSpec, PowerState
from ionotrail.terminal.power.scheduler import Plan, QueueView


class Decider(Protocol):
    def decide(self, now: float, soc: float, queue: QueueView, *, heard: int, listening: bool) -> Plan: ...


@dataclasses.dataclass(frozen=True)
class Step:
    seconds: float
    harvest_w: float
    temperature_c: float = 15.0
    arrivals: tuple[Priority, ...] = ()
    """Messages created at the step's start."""
    openings: tuple[float, ...] = ()
    """Offsets of openings within the step, ascending, below ``seconds``."""


@dataclasses.dataclass(frozen=True)
class World:
    battery: BatterySpec
    soc: float
    loads: LoadSpec
    frame_s: float = 0.1
    per_opening: int = 3
    capacity: int = 32
    duty_fraction: float = 1.0
    duty_window_s: float = 60.0


@dataclasses.dataclass(frozen=True)
class Interval:
    start: float
    end: float
    state: PowerState
    soc_start: float
    soc_end: float
    alarm_queued: bool
    priority: Priority | None = None  # the frame's, when SENDING


@dataclasses.dataclass
class ModelRun:
    intervals: list[Interval] = dataclasses.field(default_factory=list)
    frames: list[tuple[float, Priority, float]] = dataclasses.field(default_factory=list)  # start, priority, soc before
    delivered: list[tuple[float, Priority, float]] = dataclasses.field(default_factory=list)  # time, priority, created
    arrivals: list[tuple[float, Priority, float, bool, int]] = dataclasses.field(default_factory=list)  # time, priority, soc then, queued, step
    openings: list[tuple[float, bool, int]] = dataclasses.field(default_factory=list)  # time, receiver on, step
    abandoned: int = 0
    plans: list[tuple[float, Plan]] = dataclasses.field(default_factory=list)
    battery: Battery | None = None
    keyed: list[tuple[float, float]] = dataclasses.field(default_factory=list)
    ledger: list[tuple[float, float, float]] = dataclasses.field(default_factory=list)
    """(stored, harvested, consumed) joules at the start and after every interval."""


ALERT_PAST_S = 1e-6
"""The alert is taken this long after the exact crossing, so the gauge reads
the new side of the threshold (a microsecond of load: nanojoules)."""


def run(decider: Decider, world: World, steps: Sequence[Step]) -> ModelRun:
    battery = Battery(world.battery, world.soc)
    duty = DutyCycle(world.duty_fraction, world.duty_window_s)
    out = ModelRun(battery=battery)
    queue: list[tuple[Priority, float]] = []  # (priority, created), in arrival order
    thresholds = sorted({world.battery.reserve_soc * battery.capacity_j, world.battery.conserve_soc * battery.capacity_j})
    loads = {state: world.loads.loads(state) for state in PowerState}
    heard = 0
    listening = False
    t = 0.0

    def view() -> QueueView:
        alarms = [c for p, c in queue if p is Priority.ALARM]
        routine = [c for p, c in queue if p is not Priority.ALARM]
        return QueueView(len(alarms), len(routine), min(alarms, default=None), min(routine, default=None), world.capacity)

    def decide() -> Plan:
        nonlocal listening
        plan = decider.decide(t, battery.soc, view(), heard=heard, listening=listening)
        out.plans.append((t, plan))
        listening = plan.listen
        return plan

    def spend(seconds: float, state: PowerState, harvest: float, temperature: float, priority: Priority | None = None) -> bool:
        """Run ``state`` for up to ``seconds``; stop early (True) where the state
        of charge falls through a threshold, so the gauge's alert is heard."""
        nonlocal t
        e0 = battery.stored_j
        watts = sum(loads[state].values())
        cut = seconds
        if watts > harvest:  # falling: find the first threshold crossed within the piece
            for level in reversed(thresholds):
                if battery.floor_j < level <= e0:
                    crossing = (e0 - level) / (watts - harvest) + ALERT_PAST_S
                    if crossing < seconds:
                        cut = crossing
                    break
        alarm = any(p is Priority.ALARM for p, _ in queue)
        soc0 = battery.soc
        battery.run(cut, harvest, loads[state], temperature)
        if cut > 0:
            out.intervals.append(Interval(t, t + cut, state, soc0, battery.soc, alarm, priority))
            ledger = battery.ledger
            out.ledger.append((battery.stored_j, ledger.harvested_j, ledger.consumed_total_j()))
        t += cut
        return cut < seconds

    out.ledger.append((battery.stored_j, 0.0, 0.0))

    for index, step in enumerate(steps):
        end = t + step.seconds
        for priority in step.arrivals:
            soc = battery.soc
            battery.draw(world.loads.sensor_j, "sensor")
            queued = len(queue) < world.capacity
            if queued:
                queue.append((priority, t))
            else:
                out.abandoned += 1
            out.arrivals.append((t, priority, soc, queued, index))
        plan = decide()
        pending = [end - step.seconds + o for o in step.openings]
        while t < end:
            target = min([end, plan.until, *pending[:1]])
            state = PowerState.LISTENING if listening else PowerState.ASLEEP
            if spend(max(0.0, target - t), state, step.harvest_w, step.temperature_c):
                plan = decide()  # the gauge's threshold alert
                continue
            if pending and t >= pending[0]:
                pending.pop(0)
                out.openings.append((t, listening, index))
                if listening:
                    heard += 1
                    sent = 0
                    for priority in (Priority.ALARM, Priority.ROUTINE):
                        for item in [q for q in queue if q[0] is priority]:
                            if sent == world.per_opening or (priority is Priority.ROUTINE and not plan.routine):
                                break
                            if not duty.allows(t, world.frame_s):
                                break
                            out.frames.append((t, priority, battery.soc))
                            duty.record(t, t + world.frame_s)
                            out.keyed.append((t, t + world.frame_s))
                            start, alerted = t, False
                            while t < start + world.frame_s:  # a frame on the air is finished, alert or not
                                alerted |= spend(start + world.frame_s - t, PowerState.SENDING, step.harvest_w, step.temperature_c, priority)
                            queue.remove(item)
                            out.delivered.append((t, priority, item[1]))
                            sent += 1
                            if alerted:
                                plan = decide()
                    plan = decide()  # the burst's end
            elif t >= plan.until:
                plan = decide()
    return out


def violations(world: World, result: ModelRun) -> list[str]:
    """What the scheduler promised and did not keep, in words (empty: none).

    - the state of charge never falls below the chemistry's floor;
    - below the reserve, the receiver is on only with an alarm queued, and no
      routine frame starts (a frame already on the air is finished);
    - the energy consumed over any prefix of the run never exceeds what was
      stored above the floor at its start plus what was harvested;
    - the transmit duty-cycle limit holds in every sliding window.
    """
    found: list[str] = []
    spec = world.battery
    floor, reserve = spec.chemistry.soc_floor, spec.reserve_soc
    eps = 1e-9
    for iv in result.intervals:
        if min(iv.soc_start, iv.soc_end) < floor - eps:
            found.append(f"state of charge {min(iv.soc_start, iv.soc_end):.6f} below the floor {floor} at {iv.start:.3f} s")
        below = iv.soc_start < reserve - eps
        if below and iv.state is PowerState.LISTENING and not iv.alarm_queued:
            found.append(f"listening below the reserve without an alarm from {iv.start:.3f} s to {iv.end:.3f} s (soc {iv.soc_start:.6f})")
    for start, priority, soc in result.frames:
        if priority is Priority.ROUTINE and soc < reserve - eps:
            found.append(f"a routine frame started at {start:.3f} s below the reserve (soc {soc:.6f})")
    ledger = result.ledger
    floor_j = floor * world.battery.capacity_wh * 3600.0
    _, last_harvested, last_consumed = ledger[-1]
    for stored, harvested, consumed in ledger:  # from each point to the end of the run
        if last_consumed - consumed > stored - floor_j + (last_harvested - harvested) + 1e-6:
            found.append(f"consumed {last_consumed - consumed:.3f} J from a point with {stored - floor_j:.3f} J above the floor and "
                         f"{last_harvested - harvested:.3f} J harvested after it")  # fmt: skip
            break
    keyed = result.keyed
    budget = world.duty_fraction * world.duty_window_s
    for anchor in [s for s, _ in keyed] + [e - world.duty_window_s for _, e in keyed]:
        lo, hi = anchor, anchor + world.duty_window_s
        used = sum(max(0.0, min(e, hi) - max(s, lo)) for s, e in keyed)
        if used > budget + 1e-9:
            found.append(f"{used:.3f} s keyed in the window from {lo:.3f} s, above the limit {budget:.3f} s")
            break
    return found


def deadlines_missed(result: ModelRun, *, end: float, alarm_s: float, routine_s: float) -> int:
    """Messages that missed their deadline by ``end``: delivered late, still
    waiting past it, or never queued (the queue was full)."""
    limit = {Priority.ALARM: alarm_s, Priority.ROUTINE: routine_s}
    late = sum(1 for t, p, created in result.delivered if t - created > limit[p])
    waiting: dict[tuple[Priority, float], int] = {}
    for t, p, _, queued, _ in result.arrivals:
        if queued:
            waiting[(p, t)] = waiting.get((p, t), 0) + 1
    for _, p, created in result.delivered:
        waiting[(p, created)] -= 1
    overdue = sum(n for (p, created), n in waiting.items() if n > 0 and end - created > limit[p])
    return late + overdue + result.abandoned

