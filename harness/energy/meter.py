"""The terminal's battery through a simulated run.

:class:`EnergyMeter` follows the terminal service's events (the receiver
switched, a frame keyed, a sensor sample taken, a plan made) and integrates
the battery up to each one with the site's harvest and temperature
(:mod:`.site`), the loads of the power state in force
(:class:`~ionotrail.terminal.power.loads.LoadSpec`), exactly, piece by piece.
It is the simulated terminal's fuel gauge (:meth:`EnergyMeter.gauge`) and
the source of the report's ``energy`` section.

Like a fuel gauge with threshold alerts (common practice, no source), the
meter calls ``alert`` the moment the state of charge falls through the
reserve or the conserve threshold, so the power scheduler decides again at
once rather than at its next slot: after every change of load it works out,
on the same pieces it will integrate, whether and when the current loads
take the battery through the nearest threshold below it within
:data:`ALERT_HORIZON_S`, and sets a timer for that instant.
"""

from __future__ import annotations

import asyncio
import dataclasses
import datetime as dt
import math
from collections.abc import Callable
from typing import Any

from ionotrail.harness.channel.scenario import Scenario
from ionotrail.harness.energy.site import Site
from ionotrail.terminal.delivery.sender import Priority
from ionotrail.terminal.link.terminal import Transmit
from ionotrail.terminal.power.battery import CHEMISTRIES, JOULES_PER_WH, Battery, BatterySpec
from ionotrail.terminal.power.levels import Level
from ionotrail.terminal.power.loads import LOAD_NAMES, LoadSpec, PowerState
from ionotrail.terminal.power.rates import BurstRates
from ionotrail.terminal.power.scheduler import PowerScheduler, SchedulerSettings
from ionotrail.terminal.service import MessageAbandoned, MessageQueued, PlanMade, ReceiverSwitched, ServiceEvent

DEGRADATION_KEPT = 200
"""Level changes the report lists (the count goes on past it)."""
TIMELINE_SOC_EVERY_S = 900.0
FORECAST_S = 900.0
"""The span of the harvest forecast the scheduler is given: its slot."""
ALERT_HORIZON_S = 900.0
"""How far ahead a threshold crossing is looked for: a plan's longest span
(every plan, and every change of load, looks again)."""
ALERT_PAST_S = 1e-6
"""The alert comes this long after the exact crossing, so the gauge reads the new side."""


@dataclasses.dataclass
class EnergyTimeline:
    """What the plot draws of energy; recorded only when asked for."""

    soc: list[tuple[float, float]] = dataclasses.field(default_factory=list)  # time, state of charge
    listening: list[tuple[float, float]] = dataclasses.field(default_factory=list)  # receiver on from, to
    levels: list[tuple[float, str]] = dataclasses.field(default_factory=list)  # time, level entered


def battery_spec(scenario: Scenario) -> BatterySpec:
    e = scenario.energy
    return BatterySpec(e.capacity_wh, CHEMISTRIES[e.chemistry], reserve=e.reserve, conserve=e.conserve)


def load_spec(scenario: Scenario) -> LoadSpec:
    e = scenario.energy
    return LoadSpec(scenario.terminal.tx_power_w, pa_efficiency=e.pa_efficiency, controller_w=e.controller_w,
                    receiver_w=e.receiver_w, modem_w=e.modem_w, sensor_j=e.sensor_j)  # fmt: skip


def scheduler_for(scenario: Scenario, origin_unix: float, policy: str | None = None) -> PowerScheduler:
    """The terminal's power scheduler for ``scenario`` (its policy, or ``policy``);
    ``origin_unix`` is the Unix time of the loop's clock zero."""
    e = scenario.energy
    listen_w = sum(load_spec(scenario).loads(PowerState.LISTENING).values())
    settings = SchedulerSettings(
        policy=policy or e.policy, duty=e.listen_duty, duty_period_s=e.duty_period_s, alarm_deadline_s=e.alarm_deadline_s,
        routine_deadline_s=e.routine_deadline_s, batch=e.batch, conserve_batch=e.conserve_batch, listen_w=listen_w,
    )  # fmt: skip
    prior = list(e.burst_rate_prior) if e.burst_rate_prior else 30.0
    rates = BurstRates(prior)  # by UTC hour, as `ionotrail channel --json` gives bursts_per_hour (a fixed site's solar hour is a shift of it)
    return PowerScheduler(settings, battery_spec(scenario), rates, epoch_unix=origin_unix)


class EnergyMeter:
    def __init__(self, scenario: Scenario, origin: float, *, timeline: EnergyTimeline | None = None) -> None:
        """``origin``: the loop time of the scenario's start."""
        self.scenario = scenario
        self.site = Site(scenario)
        self.loads = load_spec(scenario)
        self.battery = Battery(battery_spec(scenario), scenario.energy.initial_soc)
        self.origin = origin
        self.timeline = timeline
        self.t = 0.0  # integrated up to, seconds since the start
        self.receiver_on = False
        self._on_since = 0.0
        self.tx_until = -math.inf
        self.listen_s = 0.0
        self.tx_s = 0.0
        self.level = Level.NORMAL
        self._level_since = 0.0
        self.level_s = {level: 0.0 for level in Level}
        self.degradation: list[dict[str, Any]] = []
        self.level_changes = 0
        self._next_soc_sample = 0.0
        self._by_state = {state: self.loads.loads(state) for state in PowerState}
        self._watts = {state: math.fsum(loads.values()) for state, loads in self._by_state.items()}
        spec = self.battery.spec
        self._thresholds = sorted({spec.reserve_soc * self.battery.capacity_j, spec.conserve_soc * self.battery.capacity_j})
        self.alert: Callable[[], None] | None = None
        """Called when the state of charge falls through a threshold (the service's replan)."""
        self.loop: asyncio.AbstractEventLoop | None = None
        self._alert_handle: asyncio.TimerHandle | None = None
        self.alerts = 0

    def advance(self, now: float) -> None:
        """Integrate the battery up to loop time ``now``."""
        t1 = now - self.origin
        battery, site = self.battery, self.site
        while self.t < t1:
            if self.tx_until > self.t:
                end, state = min(t1, self.tx_until), PowerState.SENDING
            else:
                end, state = t1, PowerState.LISTENING if self.receiver_on else PowerState.ASLEEP
            loads = self._by_state[state]
            for seconds, harvest_w, temperature_c in site.pieces(self.t, end):
                battery.run(seconds, harvest_w, loads, temperature_c)
            if state is PowerState.SENDING:
                self.tx_s += end - self.t
            self.t = end
        timeline = self.timeline
        if timeline is not None and self.t >= self._next_soc_sample:
            timeline.soc.append((self.t, battery.soc))
            self._next_soc_sample = self.t + TIMELINE_SOC_EVERY_S

    def forecast(self, now: float) -> float:
        """The harvest the terminal expects over the next slot (mean W; see Site.forecast_w)."""
        t = now - self.origin
        return self.site.forecast_w(t, t + FORECAST_S)

    def gauge(self, now: float) -> float:
        self.advance(now)
        return self.battery.soc

    def _arm_alert(self) -> None:
        """Set the timer for the next threshold crossing under the current loads, if within the horizon."""
        if self._alert_handle is not None:
            self._alert_handle.cancel()
            self._alert_handle = None
        if self.alert is None or self.loop is None:
            return
        self.advance(self.loop.time())  # predict from now, not from the last event
        stored = self.battery.stored_j
        below = [level for level in self._thresholds if self.battery.floor_j < level < stored]
        if not below:
            return
        level = below[-1]
        idle = self._watts[PowerState.LISTENING if self.receiver_on else PowerState.ASLEEP]
        tx_left = max(0.0, self.tx_until - self.t)
        if stored - level > idle * ALERT_HORIZON_S + self._watts[PowerState.SENDING] * tx_left:
            return  # the loads cannot take it there within the horizon
        chemistry = self.battery.spec.chemistry
        t, energy, full = self.t, stored, self.battery.capacity_j
        for end, watts in ((self.t + tx_left, self._watts[PowerState.SENDING]), (self.t + ALERT_HORIZON_S, idle)):
            for seconds, harvest_w, temperature_c in self.site.pieces(t, end):
                net = harvest_w - watts
                if net < 0 and energy + net * seconds <= level:
                    crossing = t + (energy - level) / -net
                    self._alert_handle = self.loop.call_at(self.origin + crossing + ALERT_PAST_S, self._fire_alert)
                    return
                if net < 0:
                    energy += net * seconds
                elif chemistry.min_charge_c is None or temperature_c >= chemistry.min_charge_c:  # as Battery.run: cold cells refuse charge
                    energy = min(full, energy + net * seconds * chemistry.charge_efficiency)
                t += seconds

    def _fire_alert(self) -> None:
        self._alert_handle = None
        self.alerts += 1
        assert self.alert is not None
        self.alert()  # the service replans (reading the gauge), which re-arms through its events
        self._arm_alert()

    def observe(self, now: float, event: ServiceEvent) -> None:
        self._observe(now, event)
        if isinstance(event, (Transmit, ReceiverSwitched, MessageQueued, MessageAbandoned, PlanMade)):
            self._arm_alert()

    def _observe(self, now: float, event: ServiceEvent) -> None:
        if isinstance(event, Transmit):
            self.advance(now)
            self.tx_until = max(self.tx_until, event.air_end - self.origin)
        elif isinstance(event, ReceiverSwitched):
            self.advance(now)
            if event.on and not self.receiver_on:
                self._on_since = self.t
            elif not event.on and self.receiver_on:
                self._listened(self.t)
            self.receiver_on = event.on
        elif isinstance(event, (MessageQueued, MessageAbandoned)):
            self.advance(now)
            self.battery.draw(self.loads.sensor_j, "sensor")
        elif isinstance(event, PlanMade) and event.plan.level is not self.level:
            t = now - self.origin
            self.level_s[self.level] += t - self._level_since
            self.level, self._level_since = event.plan.level, t
            self.level_changes += 1
            if len(self.degradation) < DEGRADATION_KEPT:
                self.degradation.append({
                    "t_s": round(t, 1),
                    "at": self._utc(t),
                    "level": event.plan.level.value,
                    "soc": round(event.soc, 4),
                    "why": event.plan.why,
                })  # fmt: skip
            if self.timeline is not None:
                self.timeline.levels.append((t, event.plan.level.value))

    def _listened(self, until: float) -> None:
        self.listen_s += until - self._on_since
        if self.timeline is not None:
            self.timeline.listening.append((self._on_since, until))

    def _utc(self, t: float) -> str:
        return dt.datetime.fromtimestamp(self.site.start_unix + t, dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")

    def finish(self, now: float) -> None:
        """The run ends at loop time ``now``: integrate to it and close what is open."""
        if self._alert_handle is not None:
            self._alert_handle.cancel()
            self._alert_handle = None
        self.alert = None
        self.advance(now)
        if self.receiver_on:
            self._listened(self.t)
            self._on_since = self.t
        self.level_s[self.level] += self.t - self._level_since
        self._level_since = self.t

    def section(self, *, wasted_tx_s: float, backoffs: int, duty_refusals: int) -> dict[str, Any]:
        """The report's ``energy`` section (call after :meth:`finish`)."""
        b, ledger = self.battery, self.battery.ledger

        def wh(joules: float) -> float:
            return round(joules / JOULES_PER_WH, 4)

        return {
            "policy": None,  # filled by the caller
            "harvested_wh": wh(ledger.harvested_j),
            "consumed_wh": {name: wh(ledger.consumed_j.get(name, 0.0)) for name in LOAD_NAMES},
            "charge_losses_wh": wh(ledger.charge_losses_j),
            "spilled_wh": wh(ledger.spilled_j),
            "charge_refused_wh": wh(ledger.refused_j),
            "charge_refused_hours": round(ledger.refused_s / 3600.0, 3),
            "unserved_wh": wh(ledger.unserved_j),
            "initial_wh": wh(ledger.initial_j),
            "final_wh": wh(b.stored_j),
            "ledger_error_wh": ledger.balance(b.stored_j) / JOULES_PER_WH,
            "soc_initial": round(ledger.initial_j / b.capacity_j, 4),
            "soc_min": round(b.soc_min, 4),
            "soc_final": round(b.soc, 4),
            "reserve_soc": round(b.spec.reserve_soc, 4),
            "conserve_soc": round(b.spec.conserve_soc, 4),
            "hours_below_reserve": round(b.below_reserve_s / 3600.0, 3),
            "listen_hours": round(self.listen_s / 3600.0, 3),
            "tx_seconds": round(self.tx_s, 3),
            "wasted_tx_seconds": round(wasted_tx_s, 3),
            "uplink_backoffs": backoffs,
            "tx_duty_refusals": duty_refusals,
            "level_hours": {level.value: round(s / 3600.0, 3) for level, s in self.level_s.items()},
            "level_changes": self.level_changes,
            "degradation": self.degradation,
        }


PRIORITY_NAMES = {Priority.ALARM: "alarm", Priority.ROUTINE: "routine"}
