"""The oracle bound (harness/channel/oracle.py): its dynamic programme against
brute force, its frame model against the channel's, and the bound against
what the real policies deliver on simulated hours.

Check values are computed here, not recalled: brute force enumerates every
schedule of an opening, and the channel's own ``success_probability``
(harness/channel/model.py, the function the simulated air draws frames from)
is the reference for the oracle's per-frame model.
"""

from __future__ import annotations

import math
from collections.abc import Iterator

import numpy as np
import pytest
from ionotrail.harness.channel import oracle, scenario
from ionotrail.harness.channel.model import Channel, Opening, TrailSet, with_openings
from ionotrail.harness.channel.oracle import OpeningPlan, frame_log_success, plan_values
from ionotrail.harness.runners.simulate import invariant_holds, simulate
from ionotrail.terminal.limits import FRAGMENT_OVERHEAD_BYTES

OVERHEAD = FRAGMENT_OVERHEAD_BYTES  # 10 bytes: fragment header and frame CRC (terminal/limits.py)


def _schedules(steps: int, max_payload: int, at: int = 0) -> Iterator[list[tuple[int, int]]]:
    """Every schedule of frames (first byte, payload bytes) on the byte grid
    whose frames start at bytes 0 .. steps - 1 and do not overlap (idle bytes allowed)."""
    yield []
    for start in range(at, steps):
        for payload in range(1, max_payload + 1):
            for rest in _schedules(steps, max_payload, start + payload + OVERHEAD):
                yield [(start, payload), *rest]


def _brute_force(plan: OpeningPlan, max_payload: int) -> float:
    best = 0.0
    for schedule in _schedules(plan.steps, max_payload):
        value = sum(8 * p * math.exp(frame_log_success(plan.log_ok, s, p + OVERHEAD)) for s, p in schedule)
        best = max(best, value)
    return best


def _small_plans(rng: np.random.Generator) -> list[OpeningPlan]:
    """Openings of a few dozen byte times: decaying, rising, fading and noisy
    per-byte log success (per bit, between log 0.5 and 0)."""
    plans = []
    for steps in (1, 11, 23, 30):
        n = steps + 80
        k = np.arange(n)
        shapes = [
            -0.002 * np.exp(k / 12.0),  # decaying trail
            -0.05 * np.exp(-k / 8.0),  # a stronger trail forming
            -0.01 * (1.2 + np.cos(k / 3.0)),  # a fading plateau
            -rng.uniform(0.0, 0.05, n),  # anything
        ]
        plans += [OpeningPlan(0.0, steps, np.maximum(shape, math.log(0.5))) for shape in shapes]
    return plans


def test_dynamic_programme_equals_brute_force_on_small_openings() -> None:
    """Exact grid (one byte a step): the programme's value is the best of every
    schedule, enumerated one by one."""
    max_payload = 20  # keeps the enumeration small; the programme takes any maximum
    plans = _small_plans(np.random.default_rng(11))
    values = plan_values(plans, step_bytes=1, max_payload=max_payload)
    for plan, value in zip(plans, values, strict=True):
        assert value == pytest.approx(_brute_force(plan, max_payload), rel=1e-12, abs=1e-9)


@pytest.mark.parametrize("step_bytes", [2, 3, 4])
def test_coarser_grid_never_falls_below_the_exact_programme(step_bytes: int) -> None:
    """On openings whose success per byte does not rise (a decaying trail), the
    coarse grid's relaxation only helps the oracle."""
    k = np.arange(400)
    plans = [OpeningPlan(0.0, steps, np.maximum(-scale * np.exp(k / tau), math.log(0.5)))
             for steps in (12, 40, 150) for scale, tau in ((1e-4, 30.0), (1e-3, 60.0), (1e-5, 20.0))]
    exact = plan_values(plans, step_bytes=1, max_payload=64)
    coarse = plan_values(plans, step_bytes=step_bytes, max_payload=64)
    assert np.all(coarse >= exact - 1e-9)


def _hand_made_channel() -> Channel:
    """Three openings, and a long one later: the channel looks for live trails
    no further back than the longest open time, so the long one keeps every
    frame of the first three in view."""
    demo = scenario.load(None, ["scenario.duration_hours=0.01"])
    made = [Opening(1.0, 16.0, 0.2), Opening(3.0, 22.0, 0.1, hold=0.5), Opening(5.0, 12.0, 0.35), Opening(8.0, 30.0, 0.3, hold=3.0)]
    return Channel(with_openings(TrailSet(demo), made))


def test_oracle_frame_model_agrees_with_the_channel() -> None:
    """One sample a byte (the oracle) against up to 16 across the frame (the
    channel's success_probability, which the simulated air draws from)."""
    channel = _hand_made_channel()
    plans = oracle.openings(channel, until=10.0, turnaround=0.0, burst_silence=0.25, step_bytes=1)
    assert len(plans) == 4
    byte_s = 8 / channel.params["up"].bit_rate
    worst = 0.0
    for plan in plans:
        for first in range(0, plan.steps, 7):
            for payload in (1, 16, 64, 128, 256):
                frame = payload + OVERHEAD
                ours = math.exp(frame_log_success(plan.log_ok, first, frame))
                theirs = channel.success_probability("up", plan.start_s + first * byte_s, 8 * frame)
                worst = max(worst, abs(ours - theirs))
    assert worst < 0.02


def test_turnaround_is_paid_before_the_first_frame() -> None:
    channel = _hand_made_channel()
    plans = oracle.openings(channel, until=10.0, turnaround=0.01, burst_silence=0.25)
    assert [round(p.start_s, 6) for p in plans] == [1.01, 3.01, 5.01, 8.01]


# The bound against the policies.  The oracle maximises the *expected* payload
# of each opening; a run delivers one draw of every frame.  So delivered / bound
# cannot exceed 1 except by luck: the frame draws (thousands of Bernoulli trials
# an hour: a relative spread well under 1 %) and an envelope that rises within
# one grid step (the overdense plateau's fading), which the grid's rounding of
# starts does not cover.  MARGIN allows for that luck and no more.
MARGIN = 1.02
POLICIES = ("adaptive", "fixed-32", "fixed-128", "fixed-256")


@pytest.mark.parametrize(("overrides", "seeds"), [
    (["scenario.duration_hours=1.5"], (1, 2, 3)),
    (["scenario.duration_hours=1.5", "link.bit_rate=9600", "terminal.tx_power_w=1000"], (4, 5, 6)),
])  # fmt: skip
def test_no_policy_beats_the_oracle_bound_except_by_luck(overrides: list[str], seeds: tuple[int, ...]) -> None:
    for seed in seeds:
        config = scenario.load(None, [*overrides, f"scenario.seed={seed}"])
        trails = TrailSet(config)
        for policy in POLICIES:
            report = simulate(config, policy, source="backlog", trails=trails, backlog_size=1001).report
            assert invariant_holds(report)
            bits = report["bits"]
            assert bits["oracle_bound"] > 0
            assert bits["payload_delivered"] <= MARGIN * bits["oracle_bound"], (seed, policy, bits)


def test_planning_in_batches_changes_nothing_and_keeps_memory_flat() -> None:
    # Openings are independent, so the bound over batches equals the bound over all at once.
    s = scenario.load(None, ["scenario.duration_hours=2"])
    channel = Channel(TrailSet(s))
    options = {"until": 2 * 3600.0, "turnaround": s.turnaround_s, "burst_silence": s.burst_silence_s}
    plans = oracle.openings(channel, **options)
    assert len(plans) > oracle.ORACLE_BATCH, "the run spans more than one batch"
    whole = float(np.sum(oracle.plan_values(plans)))
    assert oracle.oracle_bound_bits(channel, **options) == pytest.approx(whole, rel=1e-9)
