"""The simulator at scale: trails drawn window by window from keyed streams,
a channel that holds only the windows it needs, and a probe stream that
reckons in bulk the probes an idle terminal would ignore.

Each claim is checked against the straightforward way of doing the same
thing (the whole period at once, every probe one by one); the figures of a
year's run are benchmarks (``ionotrail simulate --days 365``), not tests.
"""

from __future__ import annotations

import copy
import dataclasses
import pickle
from typing import Any

import numpy as np
import pytest
from ionotrail.harness.channel import scenario as scenarios
from ionotrail.harness.channel.model import CELL_S, Channel, Trails, TrailSet
from ionotrail.harness.emulators.air import Air
from ionotrail.harness.runners.simulate import invariant_holds, simulate
from ionotrail.terminal.link.terminal import Arrival, Link


def demo(*overrides: str) -> scenarios.Scenario:
    return scenarios.load(None, [*overrides, *scenarios.PROTOCOL_ONLY])


def same_trails(a: Trails, b: Trails) -> None:
    for field in dataclasses.fields(Trails):
        x, y = getattr(a, field.name), getattr(b, field.name)
        if isinstance(x, dict):
            for key in x:
                assert np.array_equal(x[key], y[key]), f"{field.name}[{key}]"
        else:
            assert np.array_equal(x, y), field.name


# --- trails: the same whatever the window, whatever was skipped --------------------------


@pytest.mark.parametrize("keep", ["usable", "all"])
def test_the_trails_do_not_depend_on_the_window_size(keep: str) -> None:
    s = demo("scenario.duration_hours=54")  # not a whole number of days: the last cell is cut
    reference = TrailSet(s, keep=keep, window_s=54 * 3600 + CELL_S * 2 - 54 * 3600 % CELL_S).trails  # one window
    for window_s in (CELL_S, 2 * CELL_S, 86400.0, 3 * 86400.0):
        ts = TrailSet(s, keep=keep, window_s=window_s)
        streamed = Trails.concatenate([trails for _, trails in ts.windows()])
        same_trails(streamed, reference)
        same_trails(ts.trails, reference)
    assert len(reference) > 1000


def test_a_window_drawn_alone_is_the_same_as_drawn_after_the_others() -> None:
    s = demo("scenario.duration_hours=72")
    whole = TrailSet(s).trails
    alone = TrailSet(s).window(2)  # windows 0 and 1 never drawn
    in_day_3 = whole.select((whole.t >= 2 * 86400) & (whole.t < 3 * 86400))
    same_trails(alone, in_day_3)
    # And the period's length does not change the trails it shares with a longer one.
    day = TrailSet(demo("scenario.duration_hours=24")).trails
    same_trails(day, whole.select(whole.t < 86400))


def test_a_window_that_is_not_whole_cells_is_refused() -> None:
    with pytest.raises(ValueError, match="not a whole number of 21600-s cells"):
        TrailSet(demo("scenario.duration_hours=1"), window_s=5000.0)


def test_the_open_time_bound_summed_window_by_window_is_the_union_of_the_whole_period() -> None:
    s = demo("scenario.duration_hours=48")
    day_windows = TrailSet(s, window_s=CELL_S)
    whole = TrailSet(s, window_s=2 * 86400.0)
    union, reach = 0.0, -np.inf
    for t, length in zip(whole.trails.t.tolist(), whole.trails.open_s["up"].tolist(), strict=True):
        end = t + length
        union += max(0.0, end - max(t, reach))
        reach = max(reach, end)
    assert day_windows.capacity_bits("up") == pytest.approx(union * s.bit_rate, rel=1e-12)
    assert whole.capacity_bits("up") == pytest.approx(union * s.bit_rate, rel=1e-12)


# --- the streaming channel ---------------------------------------------------------------


def test_the_channel_holds_a_window_or_two_however_long_the_period() -> None:
    s = demo("scenario.duration_hours=120")
    ts = TrailSet(s)
    channel = Channel(ts)
    most = 0
    for t in np.arange(0.0, s.duration_s, 600.0):
        channel.success_probability("up", float(t), 200)
        most = max(most, len(channel._loaded))
    assert channel.exhausted
    assert most <= 2


def test_trail_indices_stay_whole_period_ones_as_windows_come_and_go() -> None:
    s = demo("scenario.duration_hours=72")
    whole = Channel(TrailSet(s, window_s=3 * 86400.0))
    streamed = Channel(TrailSet(s, window_s=CELL_S))
    checked = 0
    for start, _ in zip(*whole.audible_windows("up", 200), strict=True):
        a, b = whole.frame_carrier("up", start + 0.01, 200), streamed.frame_carrier("up", start + 0.01, 200)
        assert a == b
        if a is not None:
            assert whole.doppler_of("up", a[0]) == streamed.doppler_of("up", b[0])  # type: ignore[index]
            checked += 1
    assert checked > 100


def test_the_batch_success_probability_agrees_with_the_one_frame_path() -> None:
    s = demo("scenario.duration_hours=6")
    channel = Channel(TrailSet(s))
    starts, ends = channel.audible_windows("down", 56)
    compared = 0
    for a, b in list(zip(starts, ends, strict=True))[:200]:
        times = np.arange(a - 0.05, b + 0.5, 0.0173)
        batch = channel.success_probabilities("down", times, 160)
        one = np.array([channel.success_probability("down", float(t), 160) for t in times])
        assert np.allclose(batch, one, rtol=1e-9, atol=1e-12)
        compared += len(times)
    assert compared > 2000


def test_a_batch_across_openings_and_a_window_boundary_agrees_with_the_one_frame_path() -> None:
    """Probes gathered over five minutes (many openings, quiet time between,
    and the midnight where a one-window channel loads the next day)."""
    s = demo("scenario.duration_hours=48")
    streamed, whole = Channel(TrailSet(s)), Channel(TrailSet(s, window_s=2 * 86400.0))
    times = np.arange(86400.0 - 150.0, 86400.0 + 150.0, 0.1)
    batch = streamed.success_probabilities("down", times, 160)
    one = np.array([whole.success_probability("down", float(t), 160) for t in times])
    assert np.allclose(batch, one, rtol=1e-9, atol=1e-12)
    assert np.count_nonzero(one > 0.5) > 20 and np.count_nonzero(one == 0.0) > 1000


# --- the lazy probe stream -----------------------------------------------------------------


def _comparable(report: dict[str, Any]) -> dict[str, Any]:
    out = copy.deepcopy(report)
    for key in ("wall_seconds", "speedup"):
        out.pop(key)
    return out


@pytest.fixture(scope="module")
def day_both_ways() -> tuple[Any, Any]:
    s = demo("scenario.duration_hours=24")
    trails = TrailSet(s)
    return simulate(s, trails=trails, lazy_probes=False), simulate(s, trails=trails, lazy_probes=True)


def test_a_day_with_lazy_probes_is_the_day_with_every_probe(day_both_ways: tuple[Any, Any]) -> None:
    """Every probe's draw is keyed, so the lazy day differs only where the
    batch and scalar success probabilities round differently: the
    deliveries, latencies, frames and the link's counters must be equal, and
    the probe counts equal to within a handful."""
    every, lazy = day_both_ways
    assert lazy.air.counters.probes_reckoned > 0.8 * lazy.air.counters.probes_emitted_in_openings  # most were skipped
    assert [dataclasses.astuple(d) for d in lazy.deliveries] == [dataclasses.astuple(d) for d in every.deliveries]
    a, b = _comparable(every.report), _comparable(lazy.report)
    probes_a, probes_b = a.pop("probes"), b.pop("probes")
    assert a == b
    assert probes_a["emitted_in_openings"] == probes_b["emitted_in_openings"]
    assert abs(probes_a["heard"] - probes_b["heard"]) <= 3
    assert abs(every.link.counters.probes_heard - lazy.link.counters.probes_heard) <= 3
    assert dataclasses.replace(every.link.counters, probes_heard=0) == dataclasses.replace(lazy.link.counters, probes_heard=0)
    assert every.master.counters == lazy.master.counters
    strays_a, strays_b = every.link.sender.counters.stray_acks, lazy.link.sender.counters.stray_acks
    assert abs(strays_a - strays_b) <= 3 and strays_a > 1000  # most probes repeat an acknowledgement already taken
    assert dataclasses.replace(every.link.sender.counters, stray_acks=0) == dataclasses.replace(lazy.link.sender.counters, stray_acks=0)
    assert invariant_holds(lazy.report) and lazy.report["messages"]["delivered"] > 80


def test_a_probe_handed_over_in_bulk_leaves_the_link_as_one_by_one_does(monkeypatch: pytest.MonkeyPatch) -> None:
    """Over simulated hours with every probe handed over one by one: whenever
    the link said it was indifferent to a probe, a copy of the link given the
    same probe through heard_unchanged ends in exactly the state the link
    reaches through on_frame, which gives no effect."""
    checked = {"LISTENING": 0, "WAITING": 0}
    original = Link.on_frame

    def watched(self: Link, arrival: Arrival) -> list[Any]:
        if not self.indifferent_to(arrival.frame):
            return original(self, arrival)
        state = self.state.name
        twin = pickle.loads(pickle.dumps(self))
        twin.heard_unchanged(arrival.frame, [arrival.time], lambda i: arrival.snr_db)
        effects = original(self, arrival)
        assert effects == []
        twin._last_raw, twin._last_frame = self._last_raw, self._last_frame  # pickling copies; equal values
        assert pickle.dumps(vars(twin)) == pickle.dumps(vars(self))
        checked[state] += 1
        return effects

    monkeypatch.setattr(Link, "on_frame", watched)
    simulate(demo("scenario.duration_hours=3"), lazy_probes=False)
    assert checked["LISTENING"] > 1000 and checked["WAITING"] > 100, checked


def test_probes_are_handed_over_one_by_one_while_the_link_has_work() -> None:
    """A backlogged terminal is never indifferent: nothing is reckoned in bulk
    while it has messages, and the run is what it is without the shortcut."""
    s = demo("scenario.duration_hours=1")
    trails = TrailSet(s)
    lazy = simulate(s, "fixed-64", source="backlog", backlog_size=1001, trails=trails)
    every = simulate(s, "fixed-64", source="backlog", backlog_size=1001, trails=trails, lazy_probes=False)
    assert lazy.air.counters.probes_reckoned == 0
    assert _comparable(lazy.report) == _comparable(every.report)


def test_an_observer_of_every_arrival_gets_every_probe() -> None:
    s = demo("scenario.duration_hours=2")
    seen: list[float] = []

    def observe(air: Air) -> None:
        air.on_arrival = lambda role, arrival: seen.append(arrival.time)

    run = simulate(s, configure_air=observe)
    assert run.air.counters.probes_reckoned == 0
    assert len(seen) >= run.air.counters.probes_delivered > 100


def test_bulk_accounting_is_refused_when_the_link_is_not_indifferent() -> None:
    from ionotrail.terminal.delivery.sender import Sender
    from ionotrail.terminal.errors import UsageError
    from ionotrail.terminal.link.policy import by_name
    from ionotrail.terminal.wire import Probe, encode

    link = Link(Sender(7, 1), by_name("adaptive", 4800.0), bit_rate=4800.0)
    probe = encode(Probe(1, 0))
    def no_snr(i: int) -> float:
        raise AssertionError("an idle link has no use for a probe's Eb/N0")

    with pytest.raises(UsageError, match="not indifferent"):
        link.heard_unchanged(probe, [2.0, 3.0], no_snr)  # never heard: not the probe it last decoded
    link.on_frame(Arrival(probe, 1.0, 10.0, 0.0))
    link.heard_unchanged(probe, [2.0, 3.0, 4.0], no_snr)
    assert link.counters.probes_heard == 4
    link.sender.queue(b"x" * 20, 11.0)
    with pytest.raises(UsageError, match="not indifferent"):
        link.heard_unchanged(probe, [12.0], no_snr)


# --- the bounds, window by window ----------------------------------------------------------


def test_the_bounds_summed_window_by_window_are_those_of_the_whole_period() -> None:
    from ionotrail.harness.channel.oracle import oracle_bound_bits
    from ionotrail.harness.runners.simulate import period_figures
    from ionotrail.terminal.limits import DEFAULT_LIMITS

    s = demo("scenario.duration_hours=60")
    limits = dataclasses.replace(DEFAULT_LIMITS, turnaround=s.turnaround_s, burst_silence=s.burst_silence_s)
    whole = TrailSet(s, window_s=3 * 86400.0)
    streamed = period_figures(TrailSet(s, window_s=CELL_S), until=s.duration_s, limits=limits)
    assert streamed.trails == len(whole.trails)
    assert streamed.capacity_bits == pytest.approx(whole.capacity_bits("up"), rel=1e-12)
    direct = oracle_bound_bits(Channel(whole), until=s.duration_s, turnaround=limits.turnaround,
                               burst_silence=limits.burst_silence, max_payload=limits.max_fragment_payload)  # fmt: skip
    assert streamed.oracle_bits == pytest.approx(direct, rel=1e-9)
    assert direct > 1e6


def test_memory_does_not_grow_with_the_period() -> None:
    """Peak memory traced over a run of eight six-hour windows is that of a run
    of two (the deliveries list, a few kilobytes a day, is all that grows):
    trails are drawn and dropped window by window, the bounds planned likewise."""
    import tracemalloc

    def peak(hours: int) -> int:
        s = demo(f"scenario.duration_hours={hours}")
        tracemalloc.start()
        try:
            run = simulate(s, trails=TrailSet(s, window_s=CELL_S))
            assert invariant_holds(run.report)
            return tracemalloc.get_traced_memory()[1]
        finally:
            tracemalloc.stop()

    two, eight = peak(12), peak(48)
    assert eight < 1.3 * two, (two, eight)
