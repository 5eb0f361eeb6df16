"""Fragment sizing against the optimal-length result for decaying bursts."""

from __future__ import annotations

import math
import random

import pytest
from hypothesis import given
from hypothesis import strategies as st
from ionotrail.harness.channel import physics
from ionotrail.terminal.errors import UsageError
from ionotrail.terminal.link.policy import (
    MAX_FRAGMENT_PAYLOAD,
    OVERHEAD_BITS,
    RECENT_SAMPLES,
    Adaptive,
    Fixed,
    StopAndWait,
    _fit,
    by_name,
    expected_payload_bits,
    optimal_payload_bits,
)


def test_optimal_length_check_value() -> None:
    # Payload per burst L / (exp((L+H)/a) - 1) is largest where 1 - exp(-(L+H)/a) = L/a;
    # for a = 1000 and H = 48 bits, L is about 279 bits (the link-design result for
    # exponentially decaying bursts, derived from the memoryless open time).
    assert optimal_payload_bits(1000, 48) == pytest.approx(279, abs=1)


@pytest.mark.parametrize(("a", "h"), [(1000, 48), (2880, 80), (500, 80), (20000, 80)])
def test_optimum_beats_every_other_length(a: float, h: float) -> None:
    best = optimal_payload_bits(a, h)
    brute = max(range(1, int(a)), key=lambda n: expected_payload_bits(n, a, h))
    assert best == pytest.approx(brute, abs=1)
    assert 1 - math.exp(-(best + h) / a) == pytest.approx(best / a, rel=1e-9)


def test_expected_payload_matches_a_monte_carlo_of_memoryless_openings() -> None:
    """Openings whose remaining life is exponential with mean a/R: back-to-back
    fragments carry L/(e^((L+H)/a) - 1) bits on average (independent check by
    simulation; the Python generator is seeded)."""
    rng = random.Random(7)
    a, h, length = 2000.0, 80.0, 400.0
    total = 0.0
    trials = 40_000
    for _ in range(trials):
        life = rng.expovariate(1 / a)  # bits the opening lasts
        total += length * math.floor(life / (length + h))
    assert total / trials == pytest.approx(expected_payload_bits(length, a, h), rel=0.02)


def test_tau_recovered_from_probe_snr_of_an_underdense_decay() -> None:
    # Underdense decay constant tau = lambda^2 sec^2(phi) / (32 pi^2 D) (ITU-R P.843):
    # 0.3606 s at 50 MHz, sec^2 phi 18.44, 95 km (tests/test_channel_physics.py).
    d = float(physics.diffusion(95.0))
    tau = float(physics.decay_constant(physics.wavelength(50.0), 18.44, d))
    policy = Adaptive(4800, tau_scale=1.0)
    policy.burst_started(0.0)
    peak_db = 25.0
    for k in range(6):
        t = 0.05 + 0.1 * k
        policy.probe_heard(t, peak_db - 10 * math.log10(math.e) * t / tau)
    assert policy.tau_estimate_s == pytest.approx(tau, rel=1e-6)
    size = policy.payload_bytes(0.6)
    assert size == round(optimal_payload_bits(2 * tau * 4800, OVERHEAD_BITS) / 8)


def test_uplink_tau_scales_as_the_wavelength_squared() -> None:
    # tau is proportional to lambda^2 (P.843), so the uplink at f_up sees (f_down/f_up)^2 x tau_down.
    scale = (41.61 / 40.52) ** 2
    policy = Adaptive(4800, tau_scale=scale)
    for k in range(4):
        policy.probe_heard(0.1 * k, 20 - 10 * 0.1 * k)  # 10 dB/s: tau_down = 0.4343 s
    assert policy.tau_estimate_s == pytest.approx(10 / math.log(10) / 10 * scale, rel=1e-9)


def test_a_plateau_gets_the_longest_fragment_until_it_loses_frames() -> None:
    policy = Adaptive(4800)
    for k in range(5):
        policy.probe_heard(0.1 * k, 20.0)  # flat: an overdense plateau
    assert policy.payload_bytes(0.5) == MAX_FRAGMENT_PAYLOAD
    for _ in range(30):  # one fragment in three lost on the live path
        policy.fragment_settled(138, False)
        policy.fragment_settled(138, False)
        policy.fragment_settled(138, True)
    a_from_losses = policy.a_bits
    assert a_from_losses == pytest.approx(3 * 8 * 138, rel=0.05)
    assert policy.payload_bytes(0.6) == round(optimal_payload_bits(a_from_losses, OVERHEAD_BITS) / 8)
    assert policy.payload_bytes(0.6) < 128


def test_before_two_probes_the_running_mean_stands_in() -> None:
    policy = Adaptive(4800, prior_tau_s=0.3)
    assert policy.tau_estimate_s == pytest.approx(0.3)
    for k in range(3):
        policy.probe_heard(0.1 * k, 20 - 10 * 0.1 * k / (0.2 * math.log(10)))  # tau 0.2 s
    policy.burst_started(1.0)  # the burst's estimate joins the running mean
    assert policy.tau_estimate_s == pytest.approx(0.3 + (0.2 - 0.3) / 8)


def test_policies_by_name() -> None:
    assert isinstance(by_name("adaptive", 4800), Adaptive)
    assert isinstance(by_name("stop-and-wait", 4800), StopAndWait)
    fixed = by_name("fixed-96", 4800)
    assert isinstance(fixed, Fixed) and fixed.payload_bytes(0) == 96 and fixed.name == "fixed-96"
    assert by_name("stop-and-wait", 4800).waits_for_ack and not fixed.waits_for_ack
    for bad in ("fixed-2", "fixed-999", "fixed-", "greedy", "FIXED-64"):
        with pytest.raises(UsageError):
            by_name(bad, 4800)


@pytest.mark.property
@given(st.lists(st.tuples(st.sampled_from(["probe", "probe", "probe", "burst", "ask"]), st.floats(0.0, 0.2), st.floats(-5.0, 30.0)), max_size=40))
def test_the_decay_estimate_is_the_lesser_of_the_long_and_short_fits(steps: list[tuple[str, float, float]]) -> None:
    """Whatever probes and bursts came, the tau the policy sizes for is the
    lesser of the fit over every kept sample and the fit over the last
    RECENT_SAMPLES (either alone when the other has no answer), or the running
    mean without a fit: computed here the long way, both fits always made."""
    policy = Adaptive(4800.0)
    now = 0.0
    for kind, wait, snr_db in steps:
        now += wait
        if kind == "probe":
            policy.probe_heard(now, snr_db)
        elif kind == "burst":
            policy.burst_started(now)
        samples = list(policy._samples)
        fits = [f for f in (_fit(samples), _fit(samples[-RECENT_SAMPLES:])) if f is not None]
        assert policy.tau_estimate_s == (min(fits) if fits else policy.typical_tau_s)
