"""The oracle bound (harness/channel/oracle.py): its dynamic programme against
brute force, its relaxations (the rate bound over clear and dead stretches,
float32, the per-byte model's rounding) against the exact programme and the
channel's own formulas, its frame model against the channel's, and the bound
against what the real policies deliver on simulated hours.

Check values are computed here, not recalled: brute force enumerates every
schedule of an opening, the exact programme (float64, no stretch left to the
rate bound) is checked against it, and the channel's own ``success_probability``,
``_envelope`` and ``physics.bit_error_rate`` (harness/channel/model.py and
physics.py, what the simulated air draws frames from) are the reference for
the oracle's per-byte and per-frame model.
"""

from __future__ import annotations

import math
from collections.abc import Iterator

import numpy as np
import pytest
from ionotrail.harness.channel import oracle, physics, scenario
from ionotrail.harness.channel.model import FADED_TAUS, Channel, Opening, TrailSet, with_openings
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
    """Exact grid (one byte a step), exact programme: its value is the best of
    every schedule, enumerated one by one."""
    max_payload = 20  # keeps the enumeration small; the programme takes any maximum
    plans = _small_plans(np.random.default_rng(11))
    values = plan_values(plans, step_bytes=1, max_payload=max_payload, exact=True)
    for plan, value in zip(plans, values, strict=True):
        assert value == pytest.approx(_brute_force(plan, max_payload), rel=1e-12, abs=1e-9)


def _edgy_plans(rng: np.random.Generator) -> list[OpeningPlan]:
    """Openings of a few dozen byte times that start clear, end dead, or both,
    and have clear or dead bytes between: what the rate bound takes over."""
    plans = []
    for steps in (5, 17, 30):
        n = steps + 80
        k = np.arange(n)
        shapes = [
            np.where(k < steps // 2, 0.0, -0.3),  # clear, then dead
            np.where(k < 6, -1e-5, -0.004 * np.exp(k / 10.0)),  # nearly clear, then decaying
            np.where((k // 7) % 2 == 0, -1e-7, -0.02),  # clear and fading by turns
            -0.2 - 0.4 * rng.uniform(0.0, 1.0, n),  # dead throughout
            np.where(rng.uniform(0.0, 1.0, n) < 0.5, -rng.uniform(0.0, 1e-3, n), -rng.uniform(0.0, 0.7, n)),  # anything
        ]
        plans += [OpeningPlan(0.0, steps, np.maximum(shape, math.log(0.5))) for shape in shapes]
    return plans


def _rate_bound(plan: OpeningPlan, step_bytes: int, max_payload: int) -> float:
    """The rate bound alone over a whole opening: sum over the steps frames can
    cover of R(q), q the step's log success (bytes past the known ones: coin tosses)."""
    g = oracle._grid(step_bytes, max_payload, OVERHEAD)
    reach = plan.steps + g.hi - 1
    log_ok = np.concatenate([plan.log_ok, np.full(step_bytes * reach, math.log(0.5))])[: step_bytes * reach]
    q = 8.0 * log_ok.reshape(reach, step_bytes).sum(axis=1)
    return float(np.sum(oracle.jensen_rate(q, g)))


def test_relaxed_programme_never_falls_below_brute_force(monkeypatch: pytest.MonkeyPatch) -> None:
    """The programme as the report runs it (clear and dead stretches left to the
    rate bound, float32) is never below the best schedule, enumerated one by
    one, on openings built to have such stretches; nor above the rate bound
    alone (plus float32's allowance), which it only tightens.  Stretches at the
    start of any length go to the rate bound here (HEAD_MIN 0), so that openings
    small enough to enumerate have them."""
    monkeypatch.setattr(oracle, "HEAD_MIN", 0)
    max_payload = 20
    plans = _small_plans(np.random.default_rng(12)) + _edgy_plans(np.random.default_rng(13))
    values = plan_values(plans, step_bytes=1, max_payload=max_payload)
    rows, _ = oracle._prepare(plans, oracle._grid(1, max_payload, OVERHEAD), oracle.CLEAR_LOG_OK, oracle.DEAD_SHARE, oracle.MIN_GAP)
    assert np.any(rows.head_sum > 0) and np.any(rows.tail[:, 0] > 0) and np.any(rows.n == 0) and np.any(rows.n > 0)
    for plan, value in zip(plans, values, strict=True):
        best = _brute_force(plan, max_payload)
        assert best <= value <= _rate_bound(plan, 1, max_payload) * (1 + 1e-5) + oracle.F32_SLACK * (plan.steps + 1), (plan.steps, best, value)


def _long_plans(rng: np.random.Generator) -> list[OpeningPlan]:
    """Openings of hundreds to thousands of steps with clear, fading, decaying and
    dead stretches in turn (long enough for stretches to be cut out whole)."""
    plans = []
    for steps in (60, 400, 1500):
        n = 2 * steps + 600
        k = np.arange(n)
        fade = -1e-5 * (1.0 + np.cos(k / 9.0)) ** 6  # an overdense plateau's fading
        decay = -1e-9 * np.exp(np.maximum(k - n // 3, 0) / 40.0)  # a trail decaying after a third
        burst = np.where((k > n // 2) & (k < n // 2 + 300), 0.0, -0.5)  # a second trail, cut short
        # Clear, fading, dead and middling by turns, each long enough to be cut out whole.
        turns = np.array([0.0, -1.5e-3, -1e-7, -0.4, -1.8e-3, 0.0, -1.2e-3 * (1 + rng.uniform())])[(k // 500) % 7]
        shapes = [fade, decay, np.maximum(decay, burst), fade + decay, turns, -rng.uniform(0.0, 0.01, n) * (rng.uniform(0, 1, n) < 0.1)]
        plans += [OpeningPlan(0.0, steps, np.maximum(shape, math.log(0.5))) for shape in shapes]
    return plans


@pytest.mark.parametrize(("step_bytes", "max_payload"), [(1, 20), (2, 64), (2, 256), (3, 256)])
def test_relaxations_never_fall_below_the_exact_programme(step_bytes: int, max_payload: int) -> None:
    """Each relaxation alone and all together (the rate bound over stretches,
    float32 with its rounding allowance) stay at or above the exact programme
    (itself checked against brute force above), and within a few per cent of it."""
    plans = _long_plans(np.random.default_rng(14)) + _edgy_plans(np.random.default_rng(15))
    options = {"step_bytes": step_bytes, "max_payload": max_payload}
    exact = plan_values(plans, **options, exact=True)
    float32 = plan_values(plans, **options, clear_log_ok=math.inf, dead_share=-1.0)
    relaxed = plan_values(plans, **options)
    assert np.all(float32 >= exact)
    assert np.all(float32 <= exact * (1 + 1e-4) + oracle.F32_SLACK * (np.array([p.steps for p in plans]) + 1))
    assert np.all(relaxed >= exact)
    rows, _ = oracle._prepare(plans, oracle._grid(step_bytes, max_payload, OVERHEAD), oracle.CLEAR_LOG_OK, oracle.DEAD_SHARE, oracle.MIN_GAP)
    assert rows.gaps and np.any(rows.head_sum > 0) and np.any(rows.tail[:, 0] > 0) and np.any(rows.n > 0), "every relaxation is exercised"
    bound = np.array([_rate_bound(p, step_bytes, max_payload) for p in plans])
    assert np.all(relaxed <= bound * (1 + 1e-5) + oracle.F32_SLACK * (np.array([p.steps for p in plans]) + 1))


def test_relaxations_loosen_real_openings_little() -> None:
    """On a demo hour's openings the report's programme is within a per cent of
    the exact one (0.8 % when written; 0.5 % over the demo day), and the rate
    bound alone within two (1.2 % when written)."""
    demo = scenario.load(None, ["scenario.duration_hours=1"])
    plans = oracle.openings(Channel(TrailSet(demo)), until=3600.0, turnaround=demo.turnaround_s, burst_silence=demo.burst_silence_s)
    exact = float(np.sum(plan_values(plans, exact=True)))
    relaxed = float(np.sum(plan_values(plans)))
    alone = sum(_rate_bound(p, oracle.STEP_BYTES, oracle.MAX_FRAGMENT_PAYLOAD) for p in plans)
    assert exact <= relaxed <= 1.01 * exact
    assert relaxed <= alone <= 1.02 * exact


def test_a_cut_out_dead_stretch_lends_no_success() -> None:
    """A dead stretch cut out of the programme between two middling ones: the steps
    after the cut are credited their own success, not the success across the cut
    (blocks of the programme straddle cuts; a bug once credited them success 1)."""
    plans = []
    for offset in range(10):  # where the cut falls within a block
        k = np.arange(4000)
        log_ok = np.select([k < 600 + 2 * offset, k < 1600 + 2 * offset, k < 2200 + 2 * offset], [-1.5e-3, -0.4, -1.5e-3], -0.6)
        plans.append(OpeningPlan(0.0, 1200, np.maximum(log_ok, math.log(0.5))))
    rows, _ = oracle._prepare(plans, oracle._grid(2, 256, OVERHEAD), oracle.CLEAR_LOG_OK, oracle.DEAD_SHARE, oracle.MIN_GAP)
    assert len(rows.gaps) == len(plans)
    exact = plan_values(plans, exact=True)
    relaxed = plan_values(plans)
    assert np.all(relaxed >= exact)
    assert np.all(relaxed <= 1.002 * exact + 20.0), relaxed - exact


def test_batches_and_neighbours_change_no_opening() -> None:
    """An opening's value does not depend on the openings planned with it."""
    plans = _long_plans(np.random.default_rng(16)) + _edgy_plans(np.random.default_rng(17))
    together = plan_values(plans, step_bytes=2, max_payload=256)
    alone = np.array([plan_values([plan], step_bytes=2, max_payload=256)[0] for plan in plans])
    assert np.array_equal(together, alone)
    backwards = plan_values(plans[::-1], step_bytes=2, max_payload=256)[::-1]
    assert np.array_equal(together, backwards)


@pytest.mark.parametrize("step_bytes", [2, 3, 4])
def test_coarser_grid_never_falls_below_the_exact_programme(step_bytes: int) -> None:
    """On openings whose success per byte does not rise (a decaying trail), the
    coarse grid's relaxation only helps the oracle."""
    k = np.arange(400)
    plans = [OpeningPlan(0.0, steps, np.maximum(-scale * np.exp(k / tau), math.log(0.5)))
             for steps in (12, 40, 150) for scale, tau in ((1e-4, 30.0), (1e-3, 60.0), (1e-5, 20.0))]
    exact = plan_values(plans, step_bytes=1, max_payload=64, exact=True)
    coarse = plan_values(plans, step_bytes=step_bytes, max_payload=64, exact=True)
    assert np.all(coarse >= exact - 1e-9)
    assert np.all(plan_values(plans, step_bytes=step_bytes, max_payload=64) >= coarse)


# --- the rate bound and the per-byte model -------------------------------------------


@pytest.mark.parametrize(("step_bytes", "max_payload", "overhead"), [(1, 20, 10), (2, 256, 10), (3, 256, 10), (4, 64, 10), (2, 100, 5), (1, 256, 0)])
def test_rate_bound_is_at_least_every_group_s_rate(step_bytes: int, max_payload: int, overhead: int) -> None:
    """R(q) (closed form over real D, and its table) against the maximum over the
    grid's whole groups of bits_D / D x exp(D q), the inequality the rate bound needs."""
    g = oracle._grid(step_bytes, max_payload, overhead)
    q = np.concatenate([-np.logspace(-9, 1.2, 20001), [0.0], -np.linspace(0, 8 * step_bytes * math.log(2), 20001)])
    d = np.arange(g.lo, g.hi + 1)
    best = np.max(g.bits[None, :] / d[None, :] * np.exp(np.outer(q, d)), axis=1)
    closed = oracle.jensen_rate(q, g)
    assert np.all(closed >= best)
    # The real-D maximum is close to the whole-D one: a fifth of a bit a step at
    # most (where steps are all but dead), 0.017 bits on the report's grid.
    assert np.all(closed - best <= (0.02 if (step_bytes, max_payload) == (2, 256) else 0.2))
    tabled = oracle._rate(np.maximum(q, 8 * step_bytes * math.log(0.5)), g)
    assert np.all(tabled >= oracle.jensen_rate(np.maximum(q, 8 * step_bytes * math.log(0.5)), g))


def test_erfc_below_is_below_and_close() -> None:
    """Numerical Recipes' erfc (2nd ed., section 6.2: fractional error below 1.2e-7
    everywhere) scaled by 1 - ERFC_MARGIN, against math.erfc on [0, 9]."""
    z = np.linspace(0.0, 9.0, 900_001)
    ours = oracle.erfc_below(z)
    theirs = np.array([math.erfc(v) for v in z.tolist()])
    assert np.all(ours <= theirs)
    assert np.all(ours >= theirs * (1 - 3.2e-7))


@pytest.mark.parametrize("modulation", ["bpsk", "dpsk", "coherent_fsk", "noncoherent_fsk"])
def test_log_ok_is_above_the_channel_s(modulation: str) -> None:
    """log(1 - BER) per bit from the oracle's formulas against physics.bit_error_rate's."""
    x = np.concatenate([[0.0], np.logspace(-8, 2, 20001)])
    theirs = np.log1p(-np.minimum(physics.bit_error_rate(modulation, x), 0.5))
    ours = oracle.log_ok_above(modulation, x)
    assert np.all(ours >= theirs)
    assert np.all(ours - theirs <= 1e-6 * np.abs(theirs) + 1e-300)


def _model_log_ok(channel: Channel, plan: OpeningPlan) -> np.ndarray:
    """The per-byte model as it was first written: the channel's own envelope of
    every trail live at the opening, at the middle of each byte, then physics.bit_error_rate."""
    trails = channel.trails
    assert trails is not None
    n = len(plan.log_ok)
    byte_s = 8 / channel.params["up"].bit_rate
    t = plan.start_s + (np.arange(n) + 0.5) * byte_s
    live = trails.t + trails.hold["up"] + FADED_TAUS * trails.tau["up"]
    ebn0 = np.zeros(n)
    for i in np.flatnonzero((live > plan.start_s) & (trails.t <= t[-1])).tolist():
        ebn0 = np.maximum(ebn0, channel._envelope("up", np.full(n, i, dtype=np.int64), t))
    return np.log1p(-np.minimum(physics.bit_error_rate(channel.modulation, ebn0), 0.5))


def test_per_byte_model_is_above_the_channel_s_envelope() -> None:
    """Every byte of every opening of a demo hour and of the hand-made channel:
    the oracle's log success is at or above the channel's formulas', and within
    1e-3 of it except where it rounds a byte to error-free (BER < CLEAR_BER) or
    up to EBN0_FLOOR's."""
    demo = scenario.load(None, ["scenario.duration_hours=1"])
    floor = float(oracle.log_ok_above(demo.modulation, np.array([oracle.EBN0_FLOOR]))[0])
    for channel, until in ((Channel(TrailSet(demo)), 3600.0), (_hand_made_channel(), 10.0)):
        for plan in oracle.openings(channel, until=until, turnaround=0.01, burst_silence=0.25):
            theirs = _model_log_ok(channel, plan)
            assert np.all(plan.log_ok >= theirs)
            mid = (theirs < -1e-9) & (theirs > floor)  # above -1e-9, a byte's error rate is under 10 x CLEAR_BER
            assert np.all(plan.log_ok[mid] - theirs[mid] <= 1e-3 * np.abs(theirs[mid]))


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


def test_planning_in_batches_changes_nothing_and_keeps_memory_flat(monkeypatch: pytest.MonkeyPatch) -> None:
    # Openings are independent, so the bound over batches equals the bound over all at once.
    monkeypatch.setattr(oracle, "ORACLE_BATCH", 40)
    s = scenario.load(None, ["scenario.duration_hours=2"])
    channel = Channel(TrailSet(s))
    options = {"until": 2 * 3600.0, "turnaround": s.turnaround_s, "burst_silence": s.burst_silence_s}
    plans = oracle.openings(channel, **options)
    assert len(plans) > oracle.ORACLE_BATCH, "the run spans more than one batch"
    whole = float(np.sum(oracle.plan_values(plans)))
    assert oracle.oracle_bound_bits(channel, **options) == pytest.approx(whole, rel=1e-9)
