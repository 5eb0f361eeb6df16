"""The sans-I/O power core: battery, loads, degradation levels, duty cycle, burst
rates, the power scheduler, the uplink gate and the sender's routine hold.

Expectations come from the modules' stated rules (their docstrings), worked
out by hand here, never read back from the code under test: energies from
watts times seconds and the chemistry's charge efficiency, bands and levels
from the hysteresis rule, the duty-cycle limit by brute force over every
window that can hold the most airtime.  ``test_every_single_levels_cell_change_is_caught``
changes each cell of the levels table to each other level and shows the
reference comparison notices, as tests/test_link.py does for the link table.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Callable, Sequence
from fractions import Fraction
from typing import Any

import pytest
from hypothesis import given
from hypothesis import strategies as st
from ionotrail.terminal.delivery.sender import Priority, Sender
from ionotrail.terminal.errors import ProtocolError, UsageError
from ionotrail.terminal.limits import RATE_MEMORY_S
from ionotrail.terminal.link.gate import UplinkGate
from ionotrail.terminal.power import levels
from ionotrail.terminal.power.battery import CHEMISTRIES, Battery, BatterySpec, Chemistry
from ionotrail.terminal.power.duty import DutyCycle
from ionotrail.terminal.power.levels import Band, Level, classify, decide
from ionotrail.terminal.power.loads import LOAD_NAMES, LoadSpec, PowerState
from ionotrail.terminal.power.rates import BurstRates
from ionotrail.terminal.power.scheduler import PowerScheduler, QueueView, SchedulerSettings

LEAD, LIFE = CHEMISTRIES["lead-acid"], CHEMISTRIES["lifepo4"]
HOUR = 3600.0  # seconds in an hour; 1 Wh = 3600 J (SI definitions)


# =====================================================================================
# 1. Battery
# =====================================================================================

# Seconds and watts are zero or at least 1e-9 and 1e-6; a product of the two that underflows
# to zero has its own test below.
pieces = st.lists(
    st.tuples(
        st.sampled_from([0.0, 1e-9, 1e-6, 1e-3, 0.02]) | st.floats(1e-9, 1e5),  # seconds, tiny ones included
        st.just(0.0) | st.floats(1e-6, 500.0),  # panel watts
        st.dictionaries(st.sampled_from(LOAD_NAMES), st.just(0.0) | st.floats(1e-6, 700.0), min_size=1, max_size=4),
        st.floats(-30.0, 40.0),  # cell temperature, deg C
    ),
    max_size=25,
)


@pytest.mark.property
@given(
    chemistry=st.sampled_from([LEAD, LIFE]),
    window=st.floats(0.0, 1.0),
    capacity_wh=st.sampled_from([1.1, 12.0, 100.0, 2400.0]) | st.floats(0.5, 5000.0),
    pieces=pieces,
)
def test_battery_ledger_bounds_and_availability(chemistry: Chemistry, window: float, capacity_wh: float,
                                                pieces: list[tuple[float, float, dict[str, float], float]]) -> None:  # fmt: skip
    floor = chemistry.soc_floor
    soc0 = min(1.0, max(floor, floor + window * (1.0 - floor)))
    battery = Battery(BatterySpec(capacity_wh, chemistry), soc0)
    capacity_j = capacity_wh * HOUR
    floor_j = floor * capacity_j
    start_j = battery.stored_j
    full_slack = 0.0  # filling up never overshoots: see test_filling_up_never_stores_more_than_the_capacity
    observed = [soc0]  # soc_min starts at the state of charge the battery was given
    offered_j = demanded_j = 0.0
    total_s = 0.0
    for seconds, harvest_w, loads, temperature in pieces:
        before_j, refused_before = battery.stored_j, battery.ledger.refused_j
        battery.run(seconds, harvest_w, loads, temperature)
        load_w = sum(loads.values())
        offered_j += harvest_w * seconds
        demanded_j += load_w * seconds
        total_s += seconds
        # Bounds, in joules (exact) and as a state of charge (within float rounding of the division).
        assert floor_j <= battery.stored_j <= capacity_j + full_slack
        assert floor - 1e-12 <= battery.soc <= 1.0 + 1e-12
        if seconds > 0:  # a piece of no time changes nothing (and soc may read the given soc one ulp off)
            observed.append(battery.soc)
        assert battery.soc_min == min(observed), "within a piece the stored energy is a straight line, so the least is at an end"
        if chemistry is LIFE and temperature < 0.0:
            # Never charged below 0 deg C (cell makers' datasheets; common practice, no single source).
            assert battery.stored_j <= before_j
            surplus_j = max(0.0, harvest_w - load_w) * seconds
            refused = battery.ledger.refused_j - refused_before
            assert refused == pytest.approx(surplus_j, rel=1e-9, abs=1e-9 * (battery.ledger.refused_j + 1.0))
        # Energy scheduled never exceeds what was available: the cells above the floor plus the panel.
        ledger = battery.ledger
        slack = 1e-9 * (start_j + offered_j + demanded_j) + 1e-9
        assert ledger.consumed_total_j() <= (start_j - floor_j) + offered_j + slack
        assert ledger.consumed_total_j() <= (start_j - floor_j) + ledger.harvested_j + slack
        assert ledger.harvested_j <= offered_j + slack
    ledger = battery.ledger
    # initial + harvested - consumed - losses == final (the module docstring's identity).
    scale = math.fsum(abs(x) for x in (ledger.initial_j, ledger.harvested_j, ledger.consumed_total_j(),
                                       ledger.charge_losses_j, battery.stored_j))  # fmt: skip
    assert abs(ledger.balance(battery.stored_j)) <= 1e-9 * scale
    # Every joule the loads asked for was either received or went unserved.
    assert ledger.consumed_total_j() + ledger.unserved_j == pytest.approx(demanded_j, rel=1e-9, abs=1e-9)
    # Every joule the panel offered was used (by the loads, or offered to the cells, charge loss
    # included), spilled (full) or refused (too cold).
    used = ledger.harvested_j + ledger.spilled_j + ledger.refused_j
    assert used == pytest.approx(offered_j, rel=1e-9, abs=1e-9)
    assert 0.0 <= battery.below_reserve_s <= total_s * (1 + 1e-12)
    assert ledger.unserved_s <= total_s * (1 + 1e-12) and ledger.refused_s <= total_s * (1 + 1e-12)


def test_a_small_battery_filling_up_in_one_piece_reaches_full() -> None:
    # 1.1 Wh lead-acid at half charge, 50 W surplus for an hour: full after
    # 1980 J / 0.85 / 50 W = 46.6 s, then spilling.
    battery = Battery(BatterySpec(1.1, LEAD), 0.5)
    battery.run(3600.0, 55.0, {"controller": 5.0}, 20.0)
    assert battery.soc == pytest.approx(1.0, abs=1e-12)


def test_filling_up_never_stores_more_than_the_capacity() -> None:
    spec = BatterySpec(1.1, LEAD)
    battery = Battery(spec, 0.5)
    battery.run(3600.0, 55.0, {"controller": 5.0}, 20.0)
    assert battery.stored_j <= battery.capacity_j and battery.soc <= 1.0
    Battery(spec, battery.soc)  # a battery rebuilt from the state of charge it reports


def test_a_piece_whose_demand_underflows_at_the_floor_is_accounted_not_a_crash() -> None:
    battery = Battery(BatterySpec(1.1, LEAD), 0.5)  # at the floor: any deficit goes unserved
    battery.run(1e-300, 0.0, {"controller": 1e-30}, 20.0)  # 1e-330 J: below the smallest double
    assert battery.stored_j == battery.floor_j
    assert battery.ledger.consumed_total_j() + battery.ledger.unserved_j == pytest.approx(0.0, abs=1e-300)


def test_filling_to_full_at_the_computed_moment_and_spilling_the_rest() -> None:
    # 100 Wh lead-acid (360,000 J) at 0.99: 3,600 J of room.  55 W of panel, 5 W of load:
    # 50 W of surplus, of which 85 % is stored (CHEMISTRIES' lead-acid figure, common
    # practice, no source), so 42.5 W into the cells: full after 3600 / 42.5 = 84.70588 s.
    room_j = 0.01 * 360_000.0
    offered_to_cells_j = room_j / 0.85  # 4,235.294 J
    fill_s = offered_to_cells_j / 50.0  # 84.70588 s
    assert fill_s == pytest.approx(84.70588235294117, rel=1e-12)

    whole = Battery(BatterySpec(100.0, LEAD), 0.99)
    whole.run(3600.0, 55.0, {"controller": 5.0}, 20.0)
    assert whole.stored_j == pytest.approx(360_000.0, abs=1e-6)
    led = whole.ledger
    assert led.spilled_j == pytest.approx(50.0 * 3600.0 - offered_to_cells_j, rel=1e-12)  # 175,764.7 J
    assert led.charge_losses_j == pytest.approx(0.15 * offered_to_cells_j, rel=1e-12)  # 635.29 J
    assert led.harvested_j == pytest.approx(5.0 * 3600.0 + offered_to_cells_j, rel=1e-12)
    assert led.consumed_j == {"controller": pytest.approx(18_000.0, rel=1e-12)}

    # The moment: a second before it the cells are short of full by 42.5 J and nothing
    # has spilled; at it they are full; after it every surplus joule spills.
    split = Battery(BatterySpec(100.0, LEAD), 0.99)
    split.run(fill_s - 1.0, 55.0, {"controller": 5.0}, 20.0)
    assert split.stored_j == pytest.approx(360_000.0 - 42.5, abs=1e-6) and split.ledger.spilled_j == 0.0
    split.run(1.0, 55.0, {"controller": 5.0}, 20.0)
    assert split.stored_j == pytest.approx(360_000.0, abs=1e-6) and split.ledger.spilled_j == pytest.approx(0.0, abs=1e-6)
    split.run(3600.0 - fill_s, 55.0, {"controller": 5.0}, 20.0)
    assert split.ledger.spilled_j == pytest.approx(led.spilled_j, rel=1e-9)
    assert split.stored_j == pytest.approx(whole.stored_j, abs=1e-6)


def test_a_deficit_that_hits_the_floor_leaves_the_rest_unserved() -> None:
    # 100 Wh lead-acid at 0.51: 3,600 J above its 0.50 floor.  Loads 60 + 40 W, panel 40 W:
    # a 60 W deficit reaches the floor after 3600 / 60 = 60 s; then the load disconnect
    # opens for 3,540 s and 60 W x 3,540 s = 212,400 J go unserved.
    battery = Battery(BatterySpec(100.0, LEAD), 0.51)
    battery.run(3600.0, 40.0, {"receiver": 60.0, "modem": 40.0}, 20.0)
    led = battery.ledger
    assert battery.stored_j == pytest.approx(180_000.0, abs=1e-9)
    assert led.unserved_j == pytest.approx(212_400.0, rel=1e-12)
    assert led.unserved_s == pytest.approx(3540.0, rel=1e-12)
    # Received: the panel's 144,000 J and the cells' 3,600 J.
    assert led.consumed_total_j() == pytest.approx(147_600.0, rel=1e-12)
    assert led.harvested_j == pytest.approx(144_000.0, rel=1e-12)
    assert battery.soc_min == pytest.approx(0.50, abs=1e-12)


def test_a_20_ms_frame_at_600_w_takes_exactly_12_j() -> None:
    battery = Battery(BatterySpec(100.0, LIFE), 0.8)
    before = battery.stored_j
    battery.run(0.020, 0.0, {"transmitter": 600.0}, 20.0)
    assert before - battery.stored_j == pytest.approx(12.0, abs=1e-9)  # 600 W x 0.020 s
    assert battery.ledger.consumed_j["transmitter"] == pytest.approx(12.0, abs=1e-12)


def test_time_below_the_reserve_is_the_linear_crossing_fraction() -> None:
    # Lead-acid reserve: a quarter of the usable window above the 0.50 floor: 0.625, so
    # 225,000 J of a 100 Wh battery (the BatterySpec docstring's definition).
    assert BatterySpec(100.0, LEAD).reserve_soc == pytest.approx(0.625)
    falling = Battery(BatterySpec(100.0, LEAD), 0.70)  # 252,000 J
    falling.run(600.0, 0.0, {"receiver": 100.0}, 20.0)  # crosses at 27,000 / 100 = 270 s
    assert falling.below_reserve_s == pytest.approx(330.0, rel=1e-12)
    rising = Battery(BatterySpec(100.0, LEAD), 0.60)  # 216,000 J
    rising.run(200.0, 100.0, {"controller": 0.0}, 20.0)  # 85 W into the cells: 9,000 / 85 s below
    assert rising.below_reserve_s == pytest.approx(9000.0 / 85.0, rel=1e-12)
    rising.run(50.0, 0.0, {"controller": 0.0}, 20.0)  # flat above the reserve: nothing added
    assert rising.below_reserve_s == pytest.approx(9000.0 / 85.0, rel=1e-12)
    low = Battery(BatterySpec(100.0, LEAD), 0.55)
    low.run(10.0, 0.0, {"controller": 1.0}, 20.0)  # wholly below
    assert low.below_reserve_s == 10.0


def test_lifepo4_refuses_charge_below_0_c_and_takes_it_at_0_c() -> None:
    # Lithium cells are never charged below 0 deg C (cell makers' datasheets; common practice, no single source).
    cold = Battery(BatterySpec(100.0, LIFE), 0.5)
    cold.run(600.0, 100.0, {"controller": 0.0}, -5.0)
    assert cold.stored_j == 180_000.0 and cold.ledger.refused_j == pytest.approx(60_000.0) and cold.ledger.refused_s == 600.0
    thawed = Battery(BatterySpec(100.0, LIFE), 0.5)
    thawed.run(600.0, 100.0, {"controller": 0.0}, 0.0)
    assert thawed.stored_j == pytest.approx(180_000.0 + 0.97 * 60_000.0)  # 97 %: CHEMISTRIES' figure
    lead = Battery(BatterySpec(100.0, LEAD), 0.6)  # lead-acid has no such rule in this model
    lead.run(600.0, 100.0, {"controller": 0.0}, -20.0)
    assert lead.ledger.refused_j == 0.0 and lead.stored_j > 216_000.0


def test_an_impulse_is_served_down_to_the_floor() -> None:
    battery = Battery(BatterySpec(1.0, LEAD), 0.501)  # 3.6 J above the floor
    battery.draw(2.0, "sensor")
    battery.draw(2.0, "sensor")
    assert battery.ledger.consumed_j["sensor"] == pytest.approx(3.6)
    assert battery.ledger.unserved_j == pytest.approx(0.4)
    assert battery.stored_j == pytest.approx(1800.0)


@pytest.mark.parametrize(
    "call",
    [
        lambda: BatterySpec(0.0, LEAD),
        lambda: BatterySpec(100.0, LEAD, reserve=0.5, conserve=0.5),
        lambda: Battery(BatterySpec(100.0, LEAD), 0.49),
        lambda: Battery(BatterySpec(100.0, LEAD), 1.01),
        lambda: Battery(BatterySpec(100.0, LEAD), 0.8).run(-1.0, 0.0, {}, 20.0),
        lambda: Battery(BatterySpec(100.0, LEAD), 0.8).run(1.0, -1.0, {}, 20.0),
        lambda: Battery(BatterySpec(100.0, LEAD), 0.8).draw(-1.0, "sensor"),
        lambda: LoadSpec(tx_rf_w=10.0, pa_efficiency=0.0),
        lambda: LoadSpec(tx_rf_w=-1.0),
    ],
)
def test_battery_and_load_misuse_raises_usage_error(call: Callable[[], object]) -> None:
    with pytest.raises(UsageError):
        call()


def test_loads_by_power_state() -> None:
    # Supply power of a keyed transmitter: RF out over PA efficiency (a 50 % class-AB/C
    # amplifier: the loads module's figure, common practice, no source).
    spec = LoadSpec(tx_rf_w=300.0)
    assert spec.transmitter_w == 600.0
    assert dict(spec.loads(PowerState.ASLEEP)) == {"controller": 0.005}
    assert dict(spec.loads(PowerState.LISTENING)) == {"controller": 0.005, "receiver": 0.6, "modem": 0.25}
    assert dict(spec.loads(PowerState.SENDING)) == {"controller": 0.005, "receiver": 0.6, "modem": 0.25, "transmitter": 600.0}


# =====================================================================================
# 2. Degradation levels
# =====================================================================================


def reference_level(level: Level, soc: float, reserve: float, conserve: float, hysteresis: float) -> Level:
    """The rule of terminal/power/levels.py's docstring, written out: falling, a level drops
    as soon as the state of charge is below its threshold (conserve -> CONSERVE, reserve ->
    ALARMS_ONLY); rising, it returns to a higher level only once the state of charge is at
    least that level's threshold plus the hysteresis."""
    if level is Level.NORMAL:
        if soc < reserve:
            return Level.ALARMS_ONLY
        return Level.CONSERVE if soc < conserve else Level.NORMAL
    if level is Level.CONSERVE:
        if soc < reserve:
            return Level.ALARMS_ONLY
        return Level.NORMAL if soc >= conserve + hysteresis else Level.CONSERVE
    if soc >= conserve + hysteresis:
        return Level.NORMAL
    return Level.CONSERVE if soc >= reserve + hysteresis else Level.ALARMS_ONLY


THRESHOLDS = [
    (0.625, 0.75, 0.03),  # lead-acid defaults: reserve and conserve as states of charge, the scheduler's hysteresis
    (0.25, 0.5, 0.0625),  # binary-exact values, so the edges fall exactly on grid points
    (0.3, 0.6, 0.0),  # no hysteresis: the edge bands are empty
]


def soc_grid(reserve: float, conserve: float, hysteresis: float) -> list[float]:
    edges = [reserve, reserve + hysteresis, conserve, conserve + hysteresis]
    near = [x + d for x in edges for d in (-1e-9, 0.0, 1e-9)] + [math.nextafter(x, -1.0) for x in edges]
    return sorted({i / 1000 for i in range(1001)} | set(near))


def mismatches() -> list[tuple[Level, float, Level, Level]]:
    """Every (level, soc) on the grids where the code's next level differs from the reference."""
    out = []
    for reserve, conserve, hysteresis in THRESHOLDS:
        for level in Level:
            for soc in soc_grid(reserve, conserve, hysteresis):
                band = classify(soc, reserve=reserve, conserve=conserve, hysteresis=hysteresis)
                got = decide(level, band)
                want = reference_level(level, soc, reserve, conserve, hysteresis)
                if got is not want:
                    out.append((level, soc, got, want))
    return out


def test_levels_follow_the_hysteresis_rule_on_a_dense_grid() -> None:
    assert mismatches() == []


def test_the_levels_table_is_complete() -> None:
    # Every (level, band) pair can happen (module docstring), so every pair has a cell.
    assert set(levels.TRANSITIONS) == {(level, band) for level in Level for band in Band}


def test_a_missing_cell_is_a_protocol_error(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delitem(levels.TRANSITIONS, (Level.NORMAL, Band.LOW))
    with pytest.raises(ProtocolError):
        decide(Level.NORMAL, Band.LOW)


@pytest.mark.property
@given(
    thresholds=st.sampled_from(THRESHOLDS),
    start=st.floats(0.0, 1.0),
    steps=st.lists(st.floats(-0.05, 0.05), min_size=1, max_size=200),
)
def test_levels_along_random_walks(thresholds: tuple[float, float, float], start: float, steps: list[float]) -> None:
    reserve, conserve, hysteresis = thresholds
    got = want = Level.NORMAL
    soc = start
    for step in steps:
        soc = min(1.0, max(0.0, soc + step))
        got = decide(got, classify(soc, reserve=reserve, conserve=conserve, hysteresis=hysteresis))
        want = reference_level(want, soc, reserve, conserve, hysteresis)
        assert got is want, soc


def test_every_single_levels_cell_change_is_caught(capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch) -> None:
    mutants = [(cell, other) for cell, level in levels.TRANSITIONS.items() for other in Level if other is not level]
    missed = []
    for cell, other in mutants:
        with monkeypatch.context() as patch:
            patch.setitem(levels.TRANSITIONS, cell, other)
            if not mismatches():
                missed.append((cell, other))
    with capsys.disabled():
        print(f"\n[power levels mutation check] {len(mutants)} single-cell changes, {len(mutants) - len(missed)} caught")
    assert len(mutants) == len(Level) * len(Band) * (len(Level) - 1)
    assert missed == []
    assert mismatches() == []  # the table is restored


# =====================================================================================
# 3. Duty cycle
# =====================================================================================


def union(intervals: Sequence[tuple[float, float]]) -> list[tuple[float, float]]:
    out: list[list[float]] = []
    for s, e in sorted(intervals):
        if out and s <= out[-1][1]:
            out[-1][1] = max(out[-1][1], e)
        else:
            out.append([s, e])
    return [(s, e) for s, e in out]


def keyed_within(intervals: Sequence[tuple[float, float]], a: float, b: float) -> float:
    return math.fsum(max(0.0, min(e, b) - max(s, a)) for s, e in intervals)


@pytest.mark.property
@given(
    fraction=st.floats(0.01, 1.0),
    window=st.floats(1.0, 600.0),
    max_intervals=st.integers(2, 5),
    attempts=st.lists(
        st.tuples(st.just(0.0) | st.floats(0.0, 5.0) | st.floats(0.0, 300.0), st.floats(1e-3, 3.0)),
        max_size=60,
    ),
)
def test_duty_cycle_holds_in_every_window(fraction: float, window: float, max_intervals: int,
                                          attempts: list[tuple[float, float]]) -> None:  # fmt: skip
    duty = DutyCycle(fraction, window, max_intervals=max_intervals)
    keyed: list[tuple[float, float]] = []
    t = 0.0
    for gap, airtime in attempts:
        # One transmitter: a frame starts after the last one ended.
        t = max(t, keyed[-1][1] if keyed else 0.0) + gap
        if duty.allows(t, airtime):
            duty.record(t, t + airtime)
            keyed.append((t, t + airtime))
    merged = union(keyed)
    # The keyed time in [a, a + window] is piecewise linear in a, with corners where either
    # end of the window meets an interval's start or end: its maximum is at one of those.
    ends = [x for s, e in merged for x in (s, e)]
    windows = [(x, x + window) for x in ends] + [(x - window, x) for x in ends]
    for a, b in windows:
        assert keyed_within(merged, a, b) <= fraction * window + 1e-9, (a, b)


def test_a_refused_long_frame_does_not_make_a_shorter_one_forget_the_past() -> None:
    # 10 % of 10 s: 1 s of airtime in any 10 s window.  One second was keyed at [0, 1].
    duty = DutyCycle(0.1, 10.0)
    duty.record(0.0, 1.0)
    assert not duty.allows(9.5, 2.0)  # [1.5, 11.5] would hold 2 s: refused
    # [0, 10] would hold the 1 s at [0, 1] and 0.5 s of the new frame: 1.5 s > 1 s.
    assert not duty.allows(9.5, 0.5)


def test_duty_cycle_is_not_vacuous() -> None:
    # A quarter of 40 s: 10 s of airtime in any 40 s window.
    assert DutyCycle(0.25, 40.0).allows(0.0, 10.0)
    fresh = DutyCycle(0.25, 40.0)
    assert not fresh.allows(0.0, 10.001) and fresh.refusals == 1
    duty = DutyCycle(0.25, 40.0)
    duty.record(0.0, 10.0)
    assert not duty.allows(10.0, 0.001)  # [-29.999, 10.001] would hold 10.001 s
    assert not duty.allows(39.999, 10.0)  # [9.999, 49.999] holds 0.001 s of the first frame as well
    assert duty.allows(40.0, 10.0)  # [10, 50] holds only the new frame


@pytest.mark.parametrize("max_intervals", [2, 3, 32])
def test_a_stream_of_short_frames_stops_at_the_budget(max_intervals: int) -> None:
    # Half of 100 s: 50 s.  A 3 s frame every 4 s: 16 frames (48 s) fit; a 17th would make 51 s.
    duty = DutyCycle(0.5, 100.0, max_intervals=max_intervals)
    keyed = []
    for t in range(0, 200, 4):
        if duty.allows(float(t), 3.0):
            duty.record(float(t), t + 3.0)
            keyed.append((float(t), t + 3.0))
    first = [s for s, _ in keyed if s < 100.0]
    if max_intervals == 32:  # every frame remembered apart: exactly the hand count
        assert first == [4.0 * n for n in range(16)]
    assert len(first) <= 16  # merged records overstate, so never more
    ends = [x for s, e in keyed for x in (s, e)]
    for a in ends:
        assert keyed_within(keyed, a, a + 100.0) <= 50.0 + 1e-9
        assert keyed_within(keyed, a - 100.0, a) <= 50.0 + 1e-9


def test_duty_cycle_merging_only_overstates() -> None:
    duty = DutyCycle(0.5, 100.0, max_intervals=2)
    for start in (0.0, 10.0, 20.0):
        duty.record(start, start + 1.0)
    assert duty.used(0.0, 100.0) >= 3.0  # 3 s were keyed; a merged record may count the gaps too


@pytest.mark.parametrize(
    "call",
    [
        lambda: DutyCycle(0.0, 10.0),
        lambda: DutyCycle(1.5, 10.0),
        lambda: DutyCycle(0.1, 0.0),
        lambda: DutyCycle(0.1, 86401.0),
        lambda: DutyCycle(0.1, 10.0, max_intervals=1),
        lambda: DutyCycle(0.1, 10.0).record(5.0, 4.0),
    ],
)
def test_duty_cycle_misuse_raises_usage_error(call: Callable[[], object]) -> None:
    with pytest.raises(UsageError):
        call()


def test_duty_cycle_records_come_in_time_order() -> None:
    duty = DutyCycle(0.1, 10.0)
    duty.record(5.0, 6.0)
    with pytest.raises(UsageError):
        duty.record(4.0, 4.5)


# =====================================================================================
# 4. Burst rates
# =====================================================================================


def test_the_prior_stands_until_something_is_heard_then_the_observation_counts() -> None:
    # Gamma prior on a Poisson rate (rates.py docstring): 30 openings an hour over 1,800 s
    # stands for 15 openings in 1,800 s.
    rates = BurstRates(30.0, prior_s=1800.0)
    assert rates.per_second(7) == pytest.approx(30.0 / 3600.0)
    assert rates.expected_wait_s(7) == pytest.approx(120.0)
    rates.observe(7, 3600.0, 100)
    assert rates.per_second(7) == pytest.approx((15.0 + 100.0) / (1800.0 + 3600.0))
    assert rates.per_second(8) == pytest.approx(30.0 / 3600.0)  # other hours untouched


def test_the_estimate_converges_to_the_observed_rate() -> None:
    rates = BurstRates(30.0)
    observed = 72.0 / 3600.0
    errors = []
    for _ in range(60):  # sixty hours of listening in hour 3 at 72 openings an hour
        rates.observe(3, 3600.0, 72)
        errors.append(abs(rates.per_second(3) - observed))
    assert all(b <= a for a, b in itertools.pairwise(errors))
    assert errors[-1] < 0.005 * observed


def test_hours_follow_local_solar_time() -> None:
    # 15 deg of longitude is one hour of solar time (360 deg / 24 h).
    greenwich, east = BurstRates(), BurstRates(utc_offset_s=15.0 / 15.0 * 3600.0)
    west = BurstRates(utc_offset_s=-75.0 / 15.0 * 3600.0)
    assert greenwich.hour(0.0) == 0 and east.hour(0.0) == 1 and west.hour(0.0) == 19
    assert greenwich.hour(-1.0) == 23
    day = 86400.0
    for n in range(48):
        t = 3 * day + n * 1800.0 + 10.0
        assert east.hour(t) == (greenwich.hour(t) + 1) % 24
    assert greenwich.hour(3 * day + 5 * 3600.0 + 10.0) == 5


def test_memory_cap_keeps_the_ratio_and_weighs_the_past_as_rate_memory_s() -> None:
    rates = BurstRates(30.0, prior_s=1800.0)
    rates.observe(4, 40_000.0, 1000)  # 41,800 s in all, past the cap of RATE_MEMORY_S (36,000 s)
    assert RATE_MEMORY_S < 41_800.0
    assert rates.per_second(4) == pytest.approx(1015.0 / 41_800.0, rel=1e-12)  # scaling keeps the ratio
    # Listening as long as the memory and hearing nothing halves the estimate only if the
    # past now weighs exactly RATE_MEMORY_S seconds (unscaled it would be 41,800 / 77,800).
    rates.observe(4, RATE_MEMORY_S, 0)
    assert rates.per_second(4) == pytest.approx(0.5 * 1015.0 / 41_800.0, rel=1e-12)


@pytest.mark.parametrize(
    "call",
    [
        lambda: BurstRates([30.0] * 23),
        lambda: BurstRates(0.0),
        lambda: BurstRates([30.0] * 23 + [-1.0]),
        lambda: BurstRates(prior_s=0.0),
        lambda: BurstRates(prior_s=RATE_MEMORY_S + 1.0),
        lambda: BurstRates().observe(0, -1.0, 0),
        lambda: BurstRates().observe(0, 1.0, -1),
    ],
)
def test_burst_rate_misuse_raises_usage_error(call: Callable[[], object]) -> None:
    with pytest.raises(UsageError):
        call()


# =====================================================================================
# 5. Power scheduler
# =====================================================================================
# Lead-acid, 100 Wh, default reserve 0.25 and conserve 0.5 of the window above the 0.50
# floor: reserve at soc 0.625, conserve at 0.75; hysteresis 0.03.  So NORMAL holds at
# 0.78 and above, the conserve edge is [0.75, 0.78), the reserve edge [0.625, 0.655).
# Alarms run above 0.50 + 0.001.  Flat prior of 30 openings an hour: 120 s between openings.

NORMAL_SOC, CONSERVE_SOC, DEPLETED_SOC = 0.9, 0.7, 0.6
IDLE = QueueView(0, 0, None, None, 64)


def scheduler(policy: str = "adaptive", *, epoch: float = 0.0, prior: float | list[float] = 30.0,
              **settings: Any) -> PowerScheduler:  # fmt: skip
    return PowerScheduler(SchedulerSettings(policy=policy, **settings),
                          BatterySpec(100.0, LEAD), BurstRates(prior), epoch_unix=epoch)  # fmt: skip


def routine(count: int, oldest: float = 0.0, *, alarms: int = 0, capacity: int = 64) -> QueueView:
    return QueueView(alarms, count, 0.0 if alarms else None, oldest if count else None, capacity)


def next_slot_boundary(epoch: float, now: float, slot: float) -> Fraction:
    """In exact arithmetic: the first instant after ``now`` whose Unix time is a multiple of ``slot``."""
    unix = Fraction(epoch) + Fraction(now)
    return (unix // Fraction(slot) + 1) * Fraction(slot) - Fraction(epoch)


@pytest.mark.parametrize("soc_path", [[NORMAL_SOC], [1.0], [0.78], [NORMAL_SOC, 0.76]])
@pytest.mark.parametrize("queue", [IDLE, routine(1), routine(3, alarms=0), routine(30)])
def test_always_on_listens_whenever_the_level_is_normal(soc_path: list[float], queue: QueueView) -> None:
    sched = scheduler("always-on", epoch=1_700_000_000.0)
    for n, soc in enumerate(soc_path):
        now = 100.0 * n + 17.0
        plan = sched.decide(now, soc, queue, heard=0, listening=False)
    assert plan.level is Level.NORMAL  # 0.76 after 0.9 is still normal: the conserve edge
    assert plan.listen and plan.routine
    assert plan.until == next_slot_boundary(1_700_000_000.0, now, 900.0)


def test_fixed_duty_listens_for_the_first_duty_of_each_period() -> None:
    epoch = 1_000_000_050.0  # not aligned to the period or the slot
    sched = scheduler("fixed-duty", epoch=epoch, duty=0.3, duty_period_s=1000.0)
    times = sorted(set(range(0, 5000, 7)) | {950, 1249, 1250, 1950, 2250, 2249})
    for now in times:
        unix = int(epoch) + now
        phase = unix % 1000  # whole seconds: exact
        period_start = unix - phase
        on = phase < 300
        edge = period_start + 300 if on else period_start + 1000
        slot = (unix // 900 + 1) * 900
        plan = sched.decide(float(now), NORMAL_SOC, routine(2), heard=0, listening=on)
        assert plan.listen is on, now
        assert plan.routine
        assert plan.until == min(edge, slot) - epoch, now
        assert plan.until > now


def test_adaptive_does_not_listen_with_an_empty_queue() -> None:
    plan = scheduler().decide(100.0, NORMAL_SOC, IDLE, heard=0, listening=False)
    assert not plan.listen and plan.until == 900.0


@pytest.mark.parametrize("soc", [NORMAL_SOC, CONSERVE_SOC, DEPLETED_SOC, 0.5015])
def test_an_alarm_listens_at_once_above_the_floor_margin(soc: float) -> None:
    plan = scheduler().decide(10.0, soc, routine(5, alarms=1), heard=0, listening=False)
    assert plan.listen
    if soc < 0.625:  # below the reserve: the alarm goes, routine traffic does not
        assert plan.level is Level.ALARMS_ONLY and not plan.routine
    if soc >= 0.78:
        assert plan.level is Level.NORMAL and plan.routine


def test_an_alarm_at_the_floor_margin_does_not_listen() -> None:
    plan = scheduler().decide(10.0, 0.5005, routine(0, alarms=1), heard=0, listening=False)
    assert not plan.listen and plan.level is Level.ALARMS_ONLY


def test_adaptive_listens_when_the_oldest_deadline_presses() -> None:
    # Deadline 4 h after creation, minus 4 expected waits (4 x 120 s) and a 900 s slot:
    # presses 14,400 - 480 - 900 = 13,020 s after the message was made.
    sched = scheduler()
    early = sched.decide(13_000.0, NORMAL_SOC, routine(1), heard=0, listening=False)
    assert not early.listen and early.until == pytest.approx(13_020.0)
    due = sched.decide(13_020.0, NORMAL_SOC, routine(1), heard=0, listening=False)
    assert due.listen and due.routine


def test_adaptive_gathers_a_batch() -> None:
    sched = scheduler()
    waiting = sched.decide(60.0, NORMAL_SOC, routine(3), heard=0, listening=False)
    assert not waiting.listen and waiting.routine and waiting.until == 900.0
    ready = sched.decide(61.0, NORMAL_SOC, routine(4), heard=0, listening=False)
    assert ready.listen  # a flat prior: every hour is as good as the best


def test_adaptive_listens_when_the_queue_is_nearly_full() -> None:
    plan = scheduler().decide(60.0, NORMAL_SOC, routine(3, capacity=4), heard=0, listening=False)
    assert plan.listen


def test_adaptive_waits_for_a_better_hour() -> None:
    prior = [10.0] * 24
    prior[2] = 100.0  # hour 2 is ten times as good; 0.8 of it is far above hour 0's rate
    sched = scheduler(prior=prior)
    plan = sched.decide(60.0, NORMAL_SOC, routine(4, oldest=0.0), heard=0, listening=False)
    assert not plan.listen and plan.until == 900.0
    later = sched.decide(2 * 3600.0 + 5.0, NORMAL_SOC, routine(4, oldest=0.0), heard=0, listening=False)
    assert later.listen


@pytest.mark.parametrize("policy", ["always-on", "fixed-duty", "adaptive"])
def test_below_the_reserve_routine_traffic_never_runs(policy: str) -> None:
    sched = scheduler(policy)
    for now in (0.0, 450.0, 13_500.0, 20_000.0):  # the deadline pressing and the queue full too
        plan = sched.decide(now, DEPLETED_SOC, routine(60, capacity=64), heard=0, listening=False)
        assert plan.level is Level.ALARMS_ONLY and not plan.listen and not plan.routine


@pytest.mark.parametrize("policy", ["always-on", "fixed-duty", "adaptive"])
def test_conserving_defers_routine_traffic_into_batches_of_conserve_batch(policy: str) -> None:
    sched = scheduler(policy)
    deferred = sched.decide(10.0, CONSERVE_SOC, routine(11), heard=0, listening=False)
    assert deferred.level is Level.CONSERVE and not deferred.listen and not deferred.routine
    batch = sched.decide(20.0, CONSERVE_SOC, routine(12), heard=0, listening=False)
    assert batch.listen and batch.routine
    pressed = sched.decide(13_020.0, CONSERVE_SOC, routine(1), heard=0, listening=False)
    assert pressed.listen and pressed.routine
    # Back to normal only at conserve + hysteresis (0.78).
    assert sched.decide(13_030.0, 0.779, IDLE, heard=0, listening=False).level is Level.CONSERVE
    assert sched.decide(13_040.0, 0.78, IDLE, heard=0, listening=False).level is Level.NORMAL


def test_a_level_change_says_the_state_of_charge() -> None:
    sched = scheduler()
    changed = sched.decide(10.0, CONSERVE_SOC, IDLE, heard=0, listening=False)
    assert "state of charge" in changed.why and "70.0%" in changed.why
    same = sched.decide(20.0, CONSERVE_SOC, IDLE, heard=0, listening=False)
    assert "state of charge" not in same.why


def test_listening_is_credited_to_the_hours_it_spanned() -> None:
    # Listening from 3,000 s to 4,200 s of an hour-aligned clock with 12 openings heard:
    # 600 s and 6 openings to hour 0, 600 s and 6 openings to hour 1 (in proportion to time).
    sched = scheduler()
    sched.decide(3000.0, NORMAL_SOC, IDLE, heard=5, listening=False)
    sched.decide(4200.0, NORMAL_SOC, IDLE, heard=17, listening=True)
    for hour in (0, 1):
        assert sched.rates.per_second(hour) == pytest.approx((15.0 + 6.0) / (1800.0 + 600.0))


queues = st.builds(
    lambda alarms, count, age_a, age_r, spare: (alarms, count, age_a, age_r, alarms + count + spare),
    st.integers(0, 3),
    st.integers(0, 20),
    st.integers(0, 2 * 900 * 1024),  # ages on a 1/1024 s grid (see below), up to 1,800 s
    st.integers(0, 8 * 3600 * 1024),  # up to 8 h: past the routine deadline too
    st.integers(1, 40),
)


@pytest.mark.property
@given(
    policy=st.sampled_from(["always-on", "fixed-duty", "adaptive"]),
    epoch=st.integers(0, 2_000_000_000),
    steps=st.lists(
        st.tuples(st.integers(0, 3 * 3600 * 1024), st.floats(0.5, 1.0), queues, st.booleans(), st.integers(0, 3)),
        min_size=1,
        max_size=20,
    ),
)
def test_scheduler_plans_are_bounded_and_keep_routine_off_below_the_reserve(
    policy: str, epoch: int, steps: list[tuple[int, float, tuple[int, int, int, int, int], bool, int]]
) -> None:
    # Times on a 1/1024 s grid and whole-second epochs keep epoch + now exact in a double,
    # so "the next slot boundary" is well defined (the core adds them in floating point).
    sched = scheduler(policy, epoch=float(epoch))
    now, heard, level = 0.0, 0, Level.NORMAL
    for gap, soc, (alarms, count, age_a, age_r, capacity), listening, more in steps:
        now += gap / 1024
        heard += more
        queue = QueueView(alarms, count, now - age_a / 1024 if alarms else None, now - age_r / 1024 if count else None,
                          capacity)  # fmt: skip
        plan = sched.decide(now, soc, queue, heard=heard, listening=listening)
        level = reference_level(level, soc, 0.625, 0.75, 0.03)
        assert plan.level is level
        assert plan.until > now
        assert plan.until <= next_slot_boundary(float(epoch), now, 900.0)
        if plan.listen and not queue.alarms:
            assert plan.level is not Level.ALARMS_ONLY
        if plan.level is Level.ALARMS_ONLY:
            assert not plan.routine


# =====================================================================================
# 6. Uplink gate
# =====================================================================================


def test_a_closed_path_burst_raises_the_floor_and_counts_a_backoff() -> None:
    gate = UplinkGate()  # step 1 dB, relax 0.5 dB, 2 dB an hour, max 40 dB
    assert gate.allows(-100.0, 0.0)  # starts open
    gate.burst_ended(100.0, sent=3, confirmed=0, heard_after=2, first_snr_db=8.0)
    assert gate.backoffs == 1 and gate.floor_db(100.0) == 9.0
    assert not gate.allows(8.9, 100.0) and gate.allows(9.0, 100.0)
    gate.burst_ended(100.0, sent=1, confirmed=0, heard_after=1, first_snr_db=5.0)  # below the floor: the floor + step
    assert gate.backoffs == 2 and gate.floor_db(100.0) == 10.0


def test_a_confirmed_burst_lowers_the_floor_and_time_sinks_it() -> None:
    gate = UplinkGate()
    gate.burst_ended(0.0, sent=3, confirmed=0, heard_after=2, first_snr_db=8.0)  # 9 dB
    gate.burst_ended(0.0, sent=3, confirmed=1, heard_after=2, first_snr_db=12.0)
    assert gate.floor_db(0.0) == 8.5 and gate.backoffs == 1
    assert gate.floor_db(1800.0) == pytest.approx(7.5)  # 2 dB an hour, half an hour
    assert gate.floor_db(3600.0) == pytest.approx(6.5)
    assert gate.floor_db(-10.0) == 8.5  # never rises going back in time
    gate.burst_ended(3600.0, sent=1, confirmed=1, heard_after=0, first_snr_db=3.0)
    assert gate.floor_db(3600.0) == pytest.approx(6.0)


def test_an_open_gate_stays_open_after_a_confirmed_burst() -> None:
    gate = UplinkGate()
    gate.burst_ended(0.0, sent=3, confirmed=2, heard_after=1, first_snr_db=3.0)
    assert gate.floor_db(0.0) == -math.inf and gate.allows(-50.0, 0.0)


def test_unknown_snr_is_allowed_and_does_not_raise_the_floor() -> None:
    gate = UplinkGate()
    gate.burst_ended(0.0, sent=3, confirmed=0, heard_after=2, first_snr_db=8.0)
    assert gate.allows(math.nan, 0.0)
    gate.burst_ended(1.0, sent=3, confirmed=0, heard_after=2, first_snr_db=math.nan)
    assert gate.backoffs == 1 and gate.floor_db(1.0) == pytest.approx(9.0 - 2.0 / 3600.0)


@pytest.mark.parametrize(("sent", "heard_after"), [(3, 0), (0, 2)])
def test_a_burst_without_its_chance_does_not_raise_the_floor(sent: int, heard_after: int) -> None:
    # Nothing heard after the frames: the master never had the chance to acknowledge; nothing sent: nothing to judge.
    gate = UplinkGate()
    gate.burst_ended(0.0, sent=sent, confirmed=0, heard_after=heard_after, first_snr_db=8.0)
    assert gate.backoffs == 0 and gate.floor_db(0.0) == -math.inf


def test_the_floor_never_exceeds_max_db() -> None:
    gate = UplinkGate(max_db=40.0)
    gate.burst_ended(0.0, sent=3, confirmed=0, heard_after=2, first_snr_db=45.0)
    assert gate.floor_db(0.0) == 40.0
    gate.burst_ended(0.0, sent=3, confirmed=0, heard_after=2, first_snr_db=45.0)
    assert gate.floor_db(0.0) == 40.0 and gate.backoffs == 2


@pytest.mark.parametrize("kwargs", [{"step_db": 0.0}, {"relax_db": -1.0}, {"relax_db_per_hour": -1.0}, {"max_db": math.inf}])
def test_uplink_gate_misuse_raises_usage_error(kwargs: dict[str, float]) -> None:
    with pytest.raises(UsageError):
        UplinkGate(**kwargs)


# =====================================================================================
# 7. The sender's routine hold
# =====================================================================================


def test_holding_routine_traffic_sends_only_alarms_until_released() -> None:
    sender = Sender(2609, 7)
    first_routine = sender.queue(b"r" * 10, 0.0)
    alarm = sender.queue(b"a" * 10, 1.0, Priority.ALARM)
    second_routine = sender.queue(b"s" * 10, 2.0)
    assert sender.sendable == 3
    sender.hold_routine = True
    assert sender.hold_routine and sender.sendable == 1 and sender.pending == 3
    fragments = []
    while (fragment := sender.next_fragment(4, 3.0)) is not None:
        fragments.append(fragment)
    # 10 bytes + 4 of CRC-32C, in 4-byte pieces: 4 fragments, all of the alarm, all urgent.
    assert [f.message_id for f in fragments] == [alarm] * 4
    assert all(f.urgent for f in fragments) and fragments[-1].final
    assert not sender.can_send()
    sender.hold_routine = False
    assert sender.sendable == 3 and sender.can_send()
    released = sender.next_fragment(256, 4.0)
    assert released is not None and released.message_id == first_routine and not released.urgent
    following = sender.next_fragment(256, 4.0)
    assert following is not None and following.message_id == second_routine


def test_held_routine_messages_never_hold_alarms_out_of_the_id_window() -> None:
    # Routine traffic held for weeks while alarms keep coming: each alarm takes a new
    # id, and only ids within duplicate_window (64) of the oldest pending message may
    # be sent.  The service calls clear_the_window after queuing (terminal/service.py):
    # held messages at the head, never on the air, are dropped so every alarm goes.
    from ionotrail.terminal.wire.frames import AckBlock

    sender = Sender(2609, 7)
    for k in range(10):
        sender.queue(b"routine %d" % k, float(k))
    sender.hold_routine = True
    dropped = []
    for k in range(200):
        alarm = sender.queue(b"ALARM", 100.0 + k, Priority.ALARM)
        dropped += sender.clear_the_window()
        fragment = sender.next_fragment(200, 100.0 + k)
        assert fragment is not None and fragment.message_id == alarm, f"alarm {k} could not be sent"
        sender.on_ack(AckBlock(2609, alarm, complete=True), 100.5 + k)
    assert len(dropped) == 10 and sender.pending == 0
    # Without the hold nothing is dropped: the routine messages are simply sent first.
    free = Sender(2609, 7)
    free.queue(b"routine", 0.0)
    assert free.clear_the_window() == []


def test_a_routine_message_already_on_the_air_is_finished_while_held() -> None:
    sender = Sender(2609, 7)
    sender.queue(b"r" * 300, 0.0)
    first = sender.next_fragment(100, 0.0)
    assert first is not None
    sender.hold_routine = True
    assert sender.sendable == 1 and sender.next_fragment(100, 1.0) is not None  # begun: finished
    sender.queue(b"later", 2.0)
    assert sender.sendable == 1  # not begun: held
    assert sender.evict_for(Priority.ALARM) is not None and sender.pending == 1  # the unsent one makes room


def test_a_link_refuses_a_duty_budget_that_holds_no_frame() -> None:
    from ionotrail.terminal.link.policy import Fixed
    from ionotrail.terminal.link.terminal import Link
    from ionotrail.terminal.power.duty import DutyCycle

    with pytest.raises(UsageError, match="could never transmit"):
        Link(Sender(2609, 7), Fixed(64), bit_rate=4800.0, duty=DutyCycle(0.005, 60.0))
    Link(Sender(2609, 7), Fixed(64), bit_rate=4800.0, duty=DutyCycle(0.01, 60.0))  # 0.6 s holds a 0.443 s frame
