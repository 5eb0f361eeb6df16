"""When to listen and whether routine traffic may go: the power scheduler.

The receiver is the terminal's steady drain (it listens for probes for as
long as it is on); the transmitter draws far more, but only for the
fractions of a second it sends.  So the scheduler decides *listening
windows* and, within them, whether routine traffic may be sent; alarms and
the link's own rules do the rest.

Each decision takes the state of charge, the queue (counts and ages by
priority), and the usable-burst rate of the hour (:mod:`.rates`, learned from
what the receiver heard), and returns a :class:`Plan`: listen or not, routine
allowed or not, and when to decide again.  A decision is also due whenever
the queue changes or a burst ends; the plan never runs past the next slot
boundary, so a listening interval never spans two hours of the rate table.

Layers, from the battery up:

1. The degradation level (:mod:`.levels`, one table).  ALARMS_ONLY keeps the
   receiver off for routine traffic; CONSERVE defers routine traffic and sends
   it in batches of ``conserve_batch`` (or when a deadline or a full queue
   presses); NORMAL leaves it to the policy, but listens whenever CONSERVE
   would.  So every decision is monotone in the state of charge: from the
   same state, more charge never listens less or allows less
   (tests/test_power_model.py checks it for any state).
2. Alarms override everything while the battery is above the absolute floor:
   the receiver goes on at once and stays on until the alarm is acknowledged.
3. The listening policy, by name:

   ``always-on``
       listen all the time (baseline);
   ``fixed-duty``
       listen for ``duty`` of every ``duty_period_s``, whatever is queued (baseline);
   ``adaptive``
       listen only with something to send, and then when it buys the most
       messages per joule: a batch of ``batch`` routine messages in an hour
       whose burst rate is at least ``good_hour`` of the best hour left
       before the oldest message's deadline, or whenever a deadline or a
       nearly full queue presses (``pressure_waits`` expected waits, plus a
       slot, before the deadline).  Listening energy per message is the
       receiver's power times the wait for an opening, over the messages one
       opening carries; batching raises the second, good hours shorten the first.
       When the battery is full (:data:`FULL_SOC`) and the harvest forecast for
       the slot exceeds the listening load, the energy would be spilled
       anyway: it listens whenever anything is queued.
"""

from __future__ import annotations

import dataclasses
import math

from ionotrail.terminal.errors import UsageError
from ionotrail.terminal.power.battery import BatterySpec
from ionotrail.terminal.power.levels import Level, classify, decide
from ionotrail.terminal.power.rates import BurstRates

POLICIES = ("always-on", "fixed-duty", "adaptive")
FULL_SOC = 0.97
"""At or above this state of charge, with a forecast harvest above the
listening load, listening costs the battery nothing (the surplus would be spilled)."""
ALARM_MARGIN_SOC = 0.001
"""An alarm runs while the state of charge is this far above the absolute floor
(0.1 % of capacity: minutes of listening and a burst on a 100 Wh battery)."""

_WHY_LEVEL = {
    Level.NORMAL: "routine traffic as the policy decides",
    Level.CONSERVE: "routine traffic deferred and batched",
    Level.ALARMS_ONLY: "only alarm traffic runs",
}


@dataclasses.dataclass(frozen=True, slots=True)
class SchedulerSettings:
    policy: str = "adaptive"
    duty: float = 0.25
    duty_period_s: float = 3600.0
    slot_s: float = 900.0
    alarm_deadline_s: float = 900.0
    routine_deadline_s: float = 4 * 3600.0
    batch: int = 4
    conserve_batch: int = 12
    hysteresis: float = 0.03
    good_hour: float = 0.8
    pressure_waits: float = 4.0
    listen_w: float = 0.855
    """The terminal's draw while listening (controller, receiver, modem): what a
    forecast harvest must exceed for listening to be free at a full battery."""

    def __post_init__(self) -> None:
        if self.policy not in POLICIES:
            raise UsageError(f"power policy {self.policy!r} is not one of {', '.join(POLICIES)}")
        if not 0 < self.duty <= 1:
            raise UsageError(f"listening duty {self.duty!r} must be above 0 and at most 1")
        if not (0 < self.slot_s <= 3600 and (3600.0 / self.slot_s).is_integer()):
            raise UsageError(f"decision slot {self.slot_s!r} s must divide an hour")
        if not 0 < self.duty_period_s <= 86400:
            raise UsageError(f"duty period {self.duty_period_s!r} s must be above 0 and at most a day")
        for name in ("alarm_deadline_s", "routine_deadline_s"):
            if not 0 < getattr(self, name) <= 30 * 86400:
                raise UsageError(f"{name}={getattr(self, name)!r} must be above 0 and at most 30 days")
        if not (1 <= self.batch <= self.conserve_batch):
            raise UsageError(f"batch {self.batch!r} and conserve_batch {self.conserve_batch!r} must satisfy 1 <= batch <= conserve_batch")
        if not 0 <= self.hysteresis < 0.5 or not 0 < self.good_hour <= 1 or not self.pressure_waits >= 0:
            raise UsageError("hysteresis must lie in [0, 0.5), good_hour in (0, 1], pressure_waits >= 0")


@dataclasses.dataclass(frozen=True, slots=True)
class QueueView:
    """What the scheduler needs of the sender's queue."""

    alarms: int
    routine: int
    oldest_alarm: float | None
    oldest_routine: float | None
    capacity: int


@dataclasses.dataclass(frozen=True, slots=True)
class Plan:
    listen: bool
    routine: bool
    """Routine traffic may be sent (alarms always may)."""
    until: float
    """Decide again by then (earlier when the queue changes or a burst ends)."""
    level: Level
    why: str


class PowerScheduler:
    def __init__(self, settings: SchedulerSettings, battery: BatterySpec, rates: BurstRates, *, epoch_unix: float = 0.0) -> None:
        """``epoch_unix``: the Unix time of the caller's clock zero (hours of the day are read from it)."""
        if battery.conserve_soc - battery.reserve_soc < settings.hysteresis:
            raise UsageError("the conserve threshold must lie at least the hysteresis above the reserve")
        self.settings, self.battery, self.rates, self.epoch_unix = settings, battery, rates, float(epoch_unix)
        self.level = Level.NORMAL
        self.plan: Plan | None = None
        self._since = -math.inf  # when the plan in force was made
        self._heard = 0  # openings heard (the link's counter) at that time

    # --- learning ------------------------------------------------------------------

    def _learn(self, now: float, heard: int, listening: bool) -> None:
        """Credit the interval since the last decision to the rate table."""
        if listening and math.isfinite(self._since) and now > self._since:
            start, openings = self._since, heard - self._heard
            span = now - start
            while start < now:  # split at hour boundaries, openings in proportion
                unix = self.epoch_unix + start
                end = min(now, start + 3600.0 - (unix % 3600.0))
                self.rates.observe(self.rates.hour(unix), end - start, openings * (end - start) / span)
                start = end
        self._since, self._heard = now, heard

    # --- deciding ------------------------------------------------------------------

    def decide(self, now: float, soc: float, queue: QueueView, *, heard: int, listening: bool, forecast_w: float = 0.0) -> Plan:
        """The plan from ``now``: ``soc`` the state of charge, ``heard`` the link's
        count of openings heard so far, ``listening`` whether the receiver was on
        since the last decision, ``forecast_w`` the harvest expected over the next
        slot (mean watts; 0 when there is no forecast)."""
        self._learn(now, heard, listening)
        s, b = self.settings, self.battery
        band = classify(soc, reserve=b.reserve_soc, conserve=b.conserve_soc, hysteresis=s.hysteresis)
        level = decide(self.level, band)
        changed = level is not self.level
        self.level = level
        slot_end = self._next_boundary(now, s.slot_s)
        if queue.alarms and soc > b.chemistry.soc_floor + ALARM_MARGIN_SOC:
            plan = Plan(True, level is not Level.ALARMS_ONLY, slot_end, level, "an alarm is queued")
        elif level is Level.ALARMS_ONLY:
            plan = Plan(False, False, slot_end, level, _WHY_LEVEL[level])
        elif level is Level.CONSERVE:
            plan = self._batched(now, queue, s.conserve_batch, slot_end, level)
        elif (batched := self._batched(now, queue, s.conserve_batch, slot_end, level)).listen and s.policy != "always-on":
            plan = batched  # whatever conserving would send goes now too: more energy never listens less
        elif s.policy == "always-on":
            plan = Plan(True, True, slot_end, level, "always listening")
        elif s.policy == "fixed-duty":
            period = s.duty_period_s
            phase = (self.epoch_unix + now) % period
            on = phase < s.duty * period
            edge = now - phase + (s.duty * period if on else period)
            plan = Plan(on, True, min(slot_end, edge), level, "duty window" if on else "outside the duty window")
        elif queue.routine and soc >= FULL_SOC and forecast_w >= s.listen_w:
            plan = Plan(True, True, slot_end, level, "the battery is full and the sun gives more than listening takes")
        else:
            plan = self._adaptive(now, queue, slot_end, level)
        if changed:
            plan = dataclasses.replace(plan, why=f"state of charge {soc:.1%} ({band.value}): {_WHY_LEVEL[level]}")
        self.plan = plan
        return plan

    def _pressing_at(self, queue: QueueView, now: float) -> float:
        """When the oldest routine message's deadline starts to press (inf: none queued)."""
        if queue.oldest_routine is None:
            return math.inf
        wait = self.rates.expected_wait_s(self.rates.hour(self.epoch_unix + now))
        return queue.oldest_routine + self.settings.routine_deadline_s - self.settings.pressure_waits * wait - self.settings.slot_s

    def _nearly_full(self, queue: QueueView) -> bool:
        return 4 * (queue.alarms + queue.routine) >= 3 * queue.capacity

    def _batched(self, now: float, queue: QueueView, batch: int, slot_end: float, level: Level) -> Plan:
        pressing = self._pressing_at(queue, now)
        if queue.routine and (queue.routine >= batch or now >= pressing or self._nearly_full(queue)):
            return Plan(True, True, slot_end, level, "a deferred batch is due")
        return Plan(False, False, min(slot_end, max(pressing, now)), level, "routine traffic deferred")

    def _adaptive(self, now: float, queue: QueueView, slot_end: float, level: Level) -> Plan:
        s = self.settings
        if not queue.routine:
            return Plan(False, True, slot_end, level, "nothing to send")
        pressing = self._pressing_at(queue, now)
        if now >= pressing or self._nearly_full(queue):
            return Plan(True, True, slot_end, level, "a deadline or a full queue presses")
        if queue.routine >= s.batch:
            rates = self.rates
            here = rates.per_second(rates.hour(self.epoch_unix + now))
            best = here
            t = slot_end
            while t < pressing:  # the hours still usable before the deadline presses
                best = max(best, rates.per_second(rates.hour(self.epoch_unix + t)))
                t += 3600.0
            if here >= s.good_hour * best:
                return Plan(True, True, slot_end, level, "a batch is ready in a good hour")
            return Plan(False, True, min(slot_end, pressing), level, "a batch waits for a better hour")
        return Plan(False, True, min(slot_end, pressing), level, "gathering a batch")

    def _next_boundary(self, now: float, step: float) -> float:
        unix = self.epoch_unix + now
        boundary = now + (step - unix % step)
        return boundary if boundary > now else boundary + step  # a boundary a rounding error away is this one
