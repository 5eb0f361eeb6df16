"""Statistics of generated trails against the laws they follow.

Every run has a fixed seed, so each check is deterministic; the tolerances
state how far sampling noise may take a figure from its law.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from ionotrail.harness.channel import physics, scenario, sky
from ionotrail.harness.channel.model import Channel, Opening, TrailSet, with_openings

NO_SHOWERS = ["channel.showers=false"]
# A link far above threshold, so that underdense trails run well below the
# overdense transition and their durations are not truncated by it.
STRONG = [
    "link.bit_rate=300",
    "terminal.tx_power_w=10000",
    "master.tx_power_w=10000",
    "terminal.gain_dbi=20",
    "master.gain_dbi=20",
    *NO_SHOWERS,
]


def trails(*overrides: str, keep: str = "usable") -> TrailSet:
    return TrailSet(scenario.load(None, list(overrides)), keep=keep)


def test_underdense_durations_are_exponential_with_mean_two_tau_over_s_minus_one() -> None:
    # Durations above threshold: exponential with mean 2 tau / (s - 1) for a
    # cumulative flux ~ q^-(s-1) [der from the underdense decay and the flux law
    # of ITU-R P.843].  s = 2: mean 2 tau, median 2 tau ln 2, P(> mean) = 1/e.
    ts = trails(*STRONG, "scenario.duration_hours=3")
    data, d = ts.trails, "up"
    threshold = ts.directions[d].ebn0_threshold
    q_threshold = data.q * np.sqrt(threshold / data.peak_ebn0[d])
    far_below_transition = q_threshold < physics.TRANSITION_Q * math.exp(-6)  # truncation < 2 %
    sel = (data.open_s[d] > 0) & ~data.overdense & far_below_transition
    x = data.open_s[d][sel] / data.tau[d][sel]
    assert sel.sum() > 20_000
    assert x.mean() == pytest.approx(2.0, rel=0.03)
    assert np.median(x) == pytest.approx(2 * math.log(2), rel=0.03)
    assert np.mean(x > 2.0) == pytest.approx(math.exp(-1), abs=0.01)


def test_mass_index_changes_the_mean_duration() -> None:
    # s = 2.5: mean 2 tau / 1.5 = 1.33 tau.
    ts = trails(*STRONG, "scenario.duration_hours=0.1", "channel.mass_index=2.5")
    data, d = ts.trails, "up"
    q_threshold = data.q * np.sqrt(ts.directions[d].ebn0_threshold / data.peak_ebn0[d])
    sel = (data.open_s[d] > 0) & ~data.overdense & (q_threshold < physics.TRANSITION_Q * math.exp(-6))
    assert float(np.mean(data.open_s[d][sel] / data.tau[d][sel])) == pytest.approx(2 / 1.5, rel=0.04)


def _usable_up(*overrides: str) -> int:
    data = trails(*overrides).trails
    return int(np.count_nonzero(data.open_s["up"] > 0))


BASE = ["link.bit_rate=1200", "terminal.tx_power_w=1000", "master.tx_power_w=1000", *NO_SHOWERS, "scenario.duration_hours=72"]


def test_usable_rate_scales_as_the_square_root_of_transmitter_power() -> None:
    # Rate ~ P_T^((s-1)/2) = P_T^0.5 for s = 2 [der]: four times the power, twice the bursts.
    ratio = _usable_up(*BASE, "terminal.tx_power_w=4000") / _usable_up(*BASE)
    assert ratio == pytest.approx(2.0, rel=0.08)


def test_usable_rate_falls_with_frequency() -> None:
    # Rate ~ lambda^1.5 at fixed noise [der]; galactic noise falls with frequency and
    # takes back part of it, so only the direction and a rough size are checked.
    ratio = _usable_up(*BASE, "link.up_mhz=60") / _usable_up(*BASE)
    assert ratio < 0.95
    assert ratio > (40.52 / 60) ** 1.5 * 0.9


def _local_hours(ts: TrailSet) -> np.ndarray:
    return sky.local_solar_hours(ts.start_unix + ts.trails.t, ts.geometry.midpoint[1])


def test_diurnal_cycle_peaks_near_six_with_ratio_four() -> None:
    # ITU-R P.843: maximum near 06 h, minimum near 18 h local time, max/min about 4.
    ts = trails(*NO_SHOWERS, "scenario.duration_hours=240", keep="all")
    phase = 2 * math.pi * _local_hours(ts) / 24
    first_harmonic = np.mean(np.exp(1j * phase))
    amplitude = 2 * abs(first_harmonic)
    peak_hour = (math.degrees(np.angle(first_harmonic)) / 15) % 24
    assert (1 + amplitude) / (1 - amplitude) == pytest.approx(4.0, rel=0.15)
    assert peak_hour == pytest.approx(6.0, abs=0.75)


def test_seasonal_minimum_in_february_maximum_in_july() -> None:
    # ITU-R P.843: northern-hemisphere minimum in February, maximum in July.
    days = np.arange(0, 365)
    unix = 1798761600.0 + days * 86400.0  # 2027-01-01
    factor = sky.seasonal_factor(unix, 60.0)
    assert 31 <= int(np.argmin(factor)) < 59  # February
    assert 181 <= int(np.argmax(factor)) < 212  # July
    south = sky.seasonal_factor(unix, -35.0)
    assert not 31 <= int(np.argmin(south)) < 59
    # And the generated trails follow it: two days in February against two in July.
    feb = trails(*NO_SHOWERS, "scenario.start=2027-02-13T00:00:00Z", "scenario.duration_hours=48", keep="all").generated
    jul = trails(*NO_SHOWERS, "scenario.start=2027-07-14T00:00:00Z", "scenario.duration_hours=48", keep="all").generated
    assert feb / jul == pytest.approx((1 - sky.SEASONAL_AMPLITUDE) / (1 + sky.SEASONAL_AMPLITUDE), rel=0.1)


def test_a_shower_adds_trails_only_while_its_radiant_is_up() -> None:
    # The eta Aquariid radiant (declination -1 deg) sets for half the day at the
    # demo midpoint (58.9 N); the Geminids' (+33 deg) never sets there.
    shower = next(s for s in sky.SHOWERS if s.name == "eta_aquariids")
    ts = trails("scenario.start=2027-05-06T00:00:00Z", "scenario.duration_hours=24", keep="all")
    lat, lon = ts.geometry.midpoint
    code = 2 + sky.SHOWERS.index(shower)
    times = ts.start_unix + ts.trails.t[ts.trails.kind == code]
    assert len(times) > 500
    elevation = sky.radiant_sin_elevation(times, shower.ra_deg, shower.dec_deg, lat, lon)
    assert np.all(elevation > 0)
    # Ten-minute slots with the radiant well down hold no shower trail at all.
    slots = ts.start_unix + np.arange(0, 86400, 600.0)
    down = slots[sky.radiant_sin_elevation(slots + 300, shower.ra_deg, shower.dec_deg, lat, lon) < -0.1]
    assert len(down) > 30
    assert not np.any(np.isin(np.floor(times / 600.0), np.floor(down / 600.0)))
    quiet = trails("scenario.start=2027-05-06T00:00:00Z", "scenario.duration_hours=24", *NO_SHOWERS, keep="all")
    assert ts.generated > 1.3 * quiet.generated


def test_exact_replay_from_the_seed() -> None:
    a = trails("scenario.duration_hours=6", keep="all").trails
    b = trails("scenario.duration_hours=6", keep="all").trails
    c = trails("scenario.duration_hours=6", "scenario.seed=2", keep="all").trails
    assert np.array_equal(a.t, b.t) and np.array_equal(a.open_s["up"], b.open_s["up"])
    assert np.array_equal(a.doppler_hz["down"], b.doppler_hz["down"])
    assert len(a) != len(c) or not np.array_equal(a.t, c.t)


def test_a_trail_doppler_is_the_same_whatever_the_oscillators() -> None:
    # The oscillator offset belongs to the stations (the air adds it once); a
    # trail's Doppler is 2 v cos(phi) / lambda alone (McKinley 1961), so the
    # same seed gives the same column at any oscillator_ppm, within the bound
    # that 100 m/s winds set (docs/channel.md).
    still = trails("scenario.duration_hours=2", "link.oscillator_ppm=0").trails
    drifting = trails("scenario.duration_hours=2", "link.oscillator_ppm=2").trails
    for d, mhz in (("up", 40.52), ("down", 41.61)):
        assert np.array_equal(still.doppler_hz[d], drifting.doppler_hz[d])
        assert np.all(np.abs(drifting.doppler_hz[d]) <= 2 * 100.0 / physics.wavelength(mhz))


def test_filtering_usable_trails_does_not_change_the_draws() -> None:
    everything = trails("scenario.duration_hours=12", keep="all")
    usable = trails("scenario.duration_hours=12")
    mask = (everything.trails.open_s["up"] > 0) | (everything.trails.open_s["down"] > 0)
    assert np.array_equal(everything.trails.t[mask], usable.trails.t)


def test_each_direction_has_its_own_decay_constant() -> None:
    ts = trails("scenario.duration_hours=2", "link.down_mhz=60")
    data = ts.trails
    ratio = data.tau["down"] / data.tau["up"]
    assert np.allclose(ratio, (40.52 / 60) ** 2)  # tau ~ lambda^2


def test_capacity_bound_is_time_open_times_rate_counting_overlaps_once() -> None:
    ts = trails("scenario.duration_hours=6")
    union, reach = 0.0, -math.inf  # the union of [t, t + open), walked by hand
    for start, length in zip(ts.trails.t.tolist(), ts.trails.open_s["up"].tolist(), strict=True):
        end = start + length
        union += max(0.0, end - max(start, reach))
        reach = max(reach, end)
    assert ts.capacity_bits("up") == pytest.approx(union * 4800.0)
    assert union < float(ts.trails.open_s["up"].sum())  # trails do overlap on this link


def test_channel_answers_about_a_burst() -> None:
    ts = trails("scenario.duration_hours=6")
    channel = Channel(ts)
    data = ts.trails
    i = int(np.argmax(np.where(data.overdense, 0.0, data.open_s["up"])))  # the longest underdense opening
    start, length = float(data.t[i]), float(data.open_s["up"][i])
    assert channel.open_until("up", start + length / 2) == pytest.approx(start + length, rel=1e-9)
    assert channel.snr_db("up", start) == pytest.approx(10 * math.log10(data.peak_ebn0["up"][i]), abs=0.01)
    bits = 8 * 60
    early = channel.frame_success_probability("up", start, bits)
    late = channel.frame_success_probability("up", start + length + 5 * float(data.tau["up"][i]), bits)
    assert early > 0.99 and late < early
    rng_a, rng_b = np.random.default_rng(5), np.random.default_rng(5)
    draws = [channel.frame_ok("up", start + k * 0.01, bits, rng_a) for k in range(50)]
    assert draws == [channel.frame_ok("up", start + k * 0.01, bits, rng_b) for k in range(50)]
    doppler = channel.doppler_hz("up", start)
    # The trail's own shift, 2 v cos(phi) / lambda (McKinley 1961) with v at most
    # 100 m/s (docs/channel.md): the oscillators are the air's, not the trail's.
    assert doppler is not None and abs(doppler) <= 2 * 100.0 / physics.wavelength(40.52)


@pytest.mark.parametrize("modulation", ["bpsk", "noncoherent_fsk"])
def test_scalar_twins_give_the_vectorised_numbers(modulation: str) -> None:
    """The link simulation asks one frame at a time through plain-Python twins
    of the numpy methods; across trails of every kind, both directions, frames
    of 7 to 266 bytes, before, during and after each opening, they agree to
    1e-9 (the shortcuts for faded trails and surely clear frames are bounded
    well below that)."""
    channel = Channel(trails("scenario.duration_hours=6", f"link.modulation={modulation}"))
    data = channel.trails
    assert data is not None
    rng = np.random.default_rng(11)
    worst = 0.0
    checked = 0
    for i in range(0, len(data), 3):
        for direction in ("up", "down"):
            span = float(data.hold[direction][i] + 3 * data.tau[direction][i])
            for offset in (-0.01, 0.0, *rng.uniform(0, span, 4).tolist()):
                t = float(data.t[i]) + offset
                bits = int(rng.integers(56, 2129))
                worst = max(worst, abs(channel.success_probability(direction, t, bits) - channel.frame_success_probability(direction, t, bits)))
                best = channel.strongest(direction, t)
                value = channel.ebn0(direction, t)
                if best is None:  # at most a trail faded past FADED_TAUS decay constants
                    assert value < 1e-9
                else:
                    assert best[1] == pytest.approx(value, rel=1e-12)
                    assert channel.doppler_of(direction, best[0]) == channel.doppler_hz(direction, t)
                checked += 1
    assert checked > 500
    assert worst < 1e-9


def test_probe_windows_cover_every_opening_and_nothing_audible_lies_outside() -> None:
    channel = Channel(trails("scenario.duration_hours=3"))
    data = channel.trails
    assert data is not None
    starts, ends = channel.audible_windows("down", 56, p_min=1e-6)
    assert all(a < b for a, b in zip(starts, ends, strict=True)) and all(e < s for e, s in zip(ends, starts[1:], strict=False))

    def inside(t: float) -> bool:
        i = np.searchsorted(starts, t, side="right") - 1
        return bool(i >= 0 and t <= ends[i])

    up = data.open_s["down"] > 0
    for t, length in zip(data.t[up].tolist(), data.open_s["down"][up].tolist(), strict=True):
        assert inside(t) and inside(t + length * 0.999)  # the threshold-open time is inside
    for end in ends:  # just past a window a short probe all but surely fails
        assert channel.success_probability("down", end + 0.001, 56) < 1e-6


def test_a_frame_is_measured_on_the_trail_that_carries_it() -> None:
    # Trail A (12 dB, tau 0.5 s) has decayed 14 tau, to about -49 dB, when
    # trail B forms at 10 dB (peaks and decays are the openings' own
    # definitions; C, much later, holds for 12 s so that, as overdense trails
    # do on the demo link, it keeps faded trails like A among the candidates).
    # A 96-bit probe (20 ms at 4800 bit/s, sampled in four 5 ms shares) whose
    # first bit goes out 0.5 ms before B forms is carried by B as far as the
    # success model is concerned, so it is measured on B.
    base = trails("scenario.duration_hours=0.01")
    openings = [Opening(0.0, 12.0, 0.5), Opening(7.0, 10.0, 0.2), Opening(100.0, 20.0, 0.5, hold=12.0)]
    channel = Channel(with_openings(base, openings))
    early = 7.0 - 0.0005
    assert channel.success_probability("down", early, 96) > 0.99
    first_bit = channel.strongest("down", early)
    assert first_bit is not None and first_bit[0] == 0 and 10 * math.log10(first_bit[1]) < -45
    carrier = channel.frame_carrier("down", early, 96)
    assert carrier is not None and carrier[0] == 1 and 10 * math.log10(carrier[1]) == pytest.approx(10.0, abs=1e-9)
    # Formed after the model's first look (mid first share, 2.5 ms in): the
    # frame's start met only A, it all but surely fails, and it is measured on A.
    late = 7.0 - 0.004
    assert channel.success_probability("down", late, 96) < 1e-6
    assert channel.frame_carrier("down", late, 96) == channel.strongest("down", late)
    # On B, decaying: measured at the first bit, as ever.
    assert channel.frame_carrier("down", 7.1, 96) == channel.strongest("down", 7.1)
