"""Energy in whole simulations: the ledger, the loads against what went on the air,
the uplink gate on an asymmetric link, degradation in a cold winter month, the
transmit duty-cycle limit on the air, and the lazy probe stream with the receiver
switched."""

from __future__ import annotations

import dataclasses
import itertools
from pathlib import Path

import pytest
from ionotrail.harness.channel import scenario as scenarios
from ionotrail.harness.channel.model import TrailSet
from ionotrail.harness.runners.simulate import invariant_holds, simulate
from ionotrail.terminal.power.battery import CHEMISTRIES

EXAMPLES = Path(__file__).resolve().parent.parent / "docs" / "examples"


def test_a_run_accounts_for_every_joule() -> None:
    s = scenarios.load(None, ["scenario.duration_hours=12"])
    run = simulate(s)
    e, r = run.report["energy"], run.report
    assert invariant_holds(r)
    assert abs(e["ledger_error_wh"]) < 1e-9
    # The transmitter's energy is its supply power (RF power over PA efficiency: 300 W / 0.5)
    # times the airtime the air itself counted, frame by frame.
    supply_w = s.terminal.tx_power_w / s.energy.pa_efficiency
    airtime = run.air.counters.airtime_s["up"]
    assert e["tx_seconds"] == pytest.approx(airtime, abs=1e-3)
    wh = {"abs": 1e-4}  # the report rounds to 0.1 mWh
    assert e["consumed_wh"]["transmitter"] == pytest.approx(supply_w * airtime / 3600.0, **wh)
    # Receiver and modem draw while listening; the controller all the time; a sample per message.
    assert e["consumed_wh"]["receiver"] == pytest.approx(s.energy.receiver_w * e["listen_hours"], rel=1e-3)
    assert e["consumed_wh"]["modem"] == pytest.approx(s.energy.modem_w * e["listen_hours"], rel=1e-3)
    assert e["consumed_wh"]["controller"] == pytest.approx(s.energy.controller_w * 12.0, **wh)
    assert e["consumed_wh"]["sensor"] == pytest.approx(s.energy.sensor_j * r["messages"]["offered"] / 3600.0, **wh)
    # The panel's energy used is at most what it offered (the site's own integral).
    assert 0 < e["harvested_wh"] <= run.meter.site.harvest_wh(0.0, 12 * 3600.0) + 1e-4
    # The adaptive policy listened a fraction of the time; the air counted probes it missed.
    assert 0 < e["listen_hours"] < 6 and run.air.counters.probes_unheard > 0


def test_a_cold_lithium_battery_is_never_charged() -> None:
    s = scenarios.load(None, ["scenario.duration_hours=48", "battery.chemistry=lifepo4", "climate.temp_mean_c=-20",
                              "climate.temp_seasonal_c=0", "climate.temp_daily_c=2"])  # fmt: skip
    e = simulate(s, bounds=False).report["energy"]
    # No charge taken, so no charge loss: what the panel gave went straight to the loads.
    assert e["charge_losses_wh"] == 0
    assert e["harvested_wh"] == pytest.approx(sum(e["consumed_wh"].values()) - e["initial_wh"] + e["final_wh"], abs=1e-3)
    assert e["charge_refused_hours"] > 10 and e["soc_final"] < e["soc_initial"]  # the panel gave, the cells refused
    warm = simulate(dataclasses.replace(s, energy=dataclasses.replace(s.energy, temp_mean_c=10.0)), bounds=False).report["energy"]
    assert warm["charge_refused_hours"] == 0 and warm["soc_final"] > e["soc_final"]


def test_the_uplink_gate_stops_spending_into_a_closed_path() -> None:
    # A 100 W terminal and a 1 kW master: the uplink is 10 dB weaker than the downlink.
    s = scenarios.load(None, ["terminal.tx_power_w=100", "master.tx_power_w=1000", "power.policy=always-on"])
    trails = TrailSet(s)
    gated = simulate(s, trails=trails, bounds=False).report
    open_ = simulate(s, trails=trails, bounds=False, uplink_backoff=False).report
    assert gated["energy"]["uplink_backoffs"] > 0 and open_["energy"]["uplink_backoffs"] == 0
    assert gated["energy"]["wasted_tx_seconds"] < 0.5 * open_["energy"]["wasted_tx_seconds"]
    assert gated["messages"]["delivered"] >= open_["messages"]["delivered"] - 2
    assert gated["messages"]["duplicates_delivered"] == 0


def test_a_winter_month_degrades_in_order_rather_than_going_flat() -> None:
    # The example's first twelve days: a 60 Wh LiFePO4 battery in the cold at 68.9 N in
    # February, a 5 W panel: the cells refuse charge below 0 deg C, so the level goes
    # normal -> conserve -> alarms only, and alarms still go out at the end.
    s = scenarios.load(EXAMPLES / "winter-north.toml", ["scenario.duration_hours=288"])
    run = simulate(s, bounds=False)
    e = run.report["energy"]
    assert [c["level"] for c in e["degradation"]] == ["conserve", "alarms only"]
    conserve, alarms_only = (c["t_s"] for c in e["degradation"])
    assert e["degradation"][1]["soc"] == pytest.approx(e["reserve_soc"], abs=1e-4)  # the gauge's alert, at the threshold
    assert e["charge_refused_hours"] > 0 and e["hours_below_reserve"] > 0
    assert e["soc_min"] >= CHEMISTRIES["lifepo4"].soc_floor
    late_alarms = [d for d in run.deliveries if d.priority == "alarm" and d.delivered_s > alarms_only]
    late_routine = [d for d in run.deliveries if d.priority == "routine" and d.created_s is not None and d.created_s > alarms_only + 60]
    assert late_alarms and not late_routine
    assert conserve < alarms_only


def test_the_transmit_duty_cycle_limit_holds_on_the_air() -> None:
    s = scenarios.load(None, ["scenario.duration_hours=3", "power.policy=always-on", "power.tx_duty_limit=0.05", "power.tx_duty_window_s=30"])
    frames: list[tuple[float, float]] = []

    def watch(air: object) -> None:
        air.on_uplink = lambda t, n, ok, snr: frames.append((t, t + 8 * n / s.bit_rate))  # type: ignore[attr-defined]

    run = simulate(s, source="backlog", backlog_size=1000, configure_air=watch, bounds=False)
    assert run.link.duty is not None and run.link.duty.refusals > 0, "the limit was reached"
    budget = 0.05 * 30.0
    for a in itertools.chain((start for start, _ in frames), (end - 30.0 for _, end in frames)):
        keyed = sum(max(0.0, min(end, a + 30.0) - max(start, a)) for start, end in frames)
        assert keyed <= budget + 1e-9, a


def test_the_lazy_probe_stream_changes_nothing_with_the_receiver_switched() -> None:
    s = scenarios.load(None, ["scenario.duration_hours=24"])
    trails = TrailSet(s)
    lazy = simulate(s, trails=trails, bounds=False)
    every = simulate(s, trails=trails, bounds=False, lazy_probes=False)
    drop = {"wall_seconds", "speedup", "probes"}
    assert {k: v for k, v in lazy.report.items() if k not in drop} == {k: v for k, v in every.report.items() if k not in drop}
    assert lazy.air.counters.probes_reckoned > 0


def test_a_channel_forecast_seeds_the_burst_rates() -> None:
    # The hourly bursts_per_hour of `ionotrail channel --json` is the prior by UTC hour.
    from ionotrail.harness.channel.forecast import forecast
    from ionotrail.harness.energy.meter import scheduler_for

    s = scenarios.load(None, ["scenario.duration_hours=24"])
    hourly = [row["bursts_per_hour"] for row in forecast(TrailSet(s))["hourly"]]
    assert len(hourly) == 24
    seeded = scenarios.load(None, ["scenario.duration_hours=24", f"power.burst_rate_prior={hourly!r}"])
    power = scheduler_for(seeded, s.start.timestamp())
    for hour, rate in enumerate(hourly):
        assert power.rates.per_second(hour) * 3600.0 == pytest.approx(rate)
    assert invariant_holds(simulate(seeded, bounds=False).report)


def test_cloudiness_is_drawn_per_day_for_any_date() -> None:
    """Each UTC day's cloudiness factor is keyed by its day number, so it does not
    depend on which days were asked for first, and days before 1970 (negative day
    numbers) have factors of their own rather than an error."""
    from ionotrail.harness.energy.site import Site

    s = scenarios.load(None, [])
    site, other = Site(s), Site(s)
    days = [-3653, -1, 0, 1, 20000, 20001]
    forwards = [site.clearness(d) for d in days]
    backwards = [other.clearness(d) for d in reversed(days)][::-1]
    assert forwards == backwards
    assert len(set(forwards)) == len(days) and all(0.0 < c < 1.0 for c in forwards)
