"""Channel formulas against handbook values.

Values marked [der] were derived by hand from the named formula; the
formulas themselves are from the sources named in harness/channel/physics.py.
"""

from __future__ import annotations

import math

import pytest
from geographiclib.geodesic import Geodesic
from ionotrail.harness.channel import physics
from ionotrail.harness.channel.geometry import (
    EARTH_RADIUS_KM,
    central_angle,
    max_single_hop_km,
    path_geometry,
    reflection_geometry,
)


def test_diffusion_and_initial_radius_at_95_km() -> None:
    # CCIR Report 251 height relations (from memory): log10 D = 0.067 h - 5.6,
    # log10 r0 = 0.035 h - 3.45; at 95 km D = 5.8 m^2/s, r0 = 0.75 m [der].
    assert float(physics.diffusion(95.0)) == pytest.approx(5.82, abs=0.01)
    assert float(physics.initial_radius(95.0)) == pytest.approx(0.750, abs=0.001)


def test_decay_constant_at_50_mhz_and_1000_km() -> None:
    # tau = lambda^2 sec^2(phi) / (32 pi^2 D): lambda = 5.996 m, sec^2(phi) = 18.44
    # (1000 km path, 100 km height), D = 5.82: 35.95 * 18.44 / 1838 = 0.361 s [der].
    tau = physics.decay_constant(physics.wavelength(50.0), 18.44, physics.diffusion(95.0))
    assert float(tau) == pytest.approx(0.3606, rel=1e-3)
    # tau grows as lambda^2: at 40 MHz it is (50/40)^2 = 1.5625 times longer.
    assert float(physics.decay_constant(physics.wavelength(40.0), 18.44, 5.82)) / float(tau) == pytest.approx(1.5625, rel=2e-3)


def test_initial_radius_loss() -> None:
    # exp(-8 pi^2 r0^2 / (lambda^2 sec^2 phi)) at 50 MHz, r0 = 0.75 m, sec^2 = 18.44:
    # exp(-78.96 * 0.5625 / 663.0) = exp(-0.0670) = 0.935 [der].
    loss = physics.initial_radius_factor(physics.wavelength(50.0), 18.44, 0.75)
    assert float(loss) == pytest.approx(0.9352, abs=5e-4)


def test_overdense_duration() -> None:
    # T = r_e q lambda^2 sec^2(phi) / (4 pi^2 D) = 7.14e-17 q lambda^2 sec^2(phi) / D:
    # q = 1e15, 50 MHz, sec^2 = 18.44, D = 5.82: 7.14e-17 * 1e15 * 35.95 * 18.44 / 5.82 = 8.13 s [der].
    assert physics.R_E / (4 * math.pi**2) == pytest.approx(7.14e-17, rel=1e-3)
    assert float(physics.overdense_duration(1e15, physics.wavelength(50.0), 18.44, 5.82)) == pytest.approx(8.13, rel=2e-3)


def test_galactic_noise_and_kt0() -> None:
    # ITU-R P.372: F_am = 52 - 23 log10 f: 12.92 dB at 50 MHz, 15.15 dB at 40 MHz [der].
    assert physics.galactic_noise_db(50.0) == pytest.approx(12.92, abs=0.01)
    assert physics.galactic_noise_db(40.0) == pytest.approx(15.15, abs=0.01)
    # kT0 at 290 K: -173.98 dBm/Hz.
    assert physics.KT0_DBM_HZ == pytest.approx(-173.98, abs=0.01)


def test_man_made_noise_categories() -> None:
    # ITU-R P.372 (c, d) from memory: rural 67.2 - 27.7 log10 f.
    assert physics.man_made_noise_db(40.0, "rural") == pytest.approx(67.2 - 27.7 * math.log10(40.0))
    quiet, business = physics.man_made_noise_db(40.0, "quiet_rural"), physics.man_made_noise_db(40.0, "business")
    assert quiet < business


@pytest.mark.parametrize(
    ("modulation", "db"),
    # Eb/N0 for a bit-error rate of 1e-5 [der from the textbook formulas]:
    # BPSK Q(sqrt(2x)), DPSK exp(-x)/2, coherent FSK Q(sqrt(x)), non-coherent FSK exp(-x/2)/2.
    [("bpsk", 9.59), ("dpsk", 10.34), ("coherent_fsk", 12.60), ("noncoherent_fsk", 13.35)],
)
def test_bit_error_thresholds(modulation: str, db: float) -> None:
    assert 10 * math.log10(physics.threshold_ebn0(modulation, 1e-5)) == pytest.approx(db, abs=0.01)


def test_q_function_against_the_normal_table() -> None:
    # Standard normal upper tail: Q(1) = 0.158655, Q(3) = 0.0013499 (any statistics table).
    assert float(physics.q_function(1.0)) == pytest.approx(0.158655, rel=1e-5)
    assert float(physics.q_function(3.0)) == pytest.approx(0.0013499, rel=1e-4)


def test_single_hop_limit() -> None:
    # 2 R_e acos(R_e / (R_e + h)): 2243 km at 100 km, 2129 km at 90 km [der].
    assert max_single_hop_km(100.0) == pytest.approx(2243, abs=1)
    assert max_single_hop_km(90.0) == pytest.approx(2129, abs=1)


def test_half_angle_and_elevation_at_1000_km() -> None:
    # 1000 km path, 100 km height: phi = 76.5 deg, sec^2(phi) = 18.44, elevation 9.0 deg [der].
    phi, elevation, _ = reflection_geometry(1000.0, 100.0)
    assert phi == pytest.approx(76.5, abs=0.05)
    assert 1 / math.cos(math.radians(phi)) ** 2 == pytest.approx(18.44, abs=0.05)
    assert elevation == pytest.approx(9.0, abs=0.05)


def test_doppler_example() -> None:
    # f_D = 2 v cos(phi) / lambda at 50 MHz, 50 m/s, phi = 70 deg: 5.70 Hz [der].
    shift = physics.doppler_hz(50.0, math.cos(math.radians(70.0)), physics.wavelength(50.0))
    assert float(shift) == pytest.approx(5.70, abs=0.01)


@pytest.mark.parametrize(
    "pair",
    [((61.20, 14.10), (55.60, 27.20)), ((-33.0, 151.0), (-27.5, 153.0)), ((45.0, -120.0), (40.0, -111.0))],
)
def test_great_circle_distance_against_geographiclib(pair: tuple[tuple[float, float], tuple[float, float]]) -> None:
    # geographiclib (Karney 2013) on the WGS84 ellipsoid is the reference; a sphere
    # of mean radius is within 0.5 % at these distances.
    (lat1, lon1), (lat2, lon2) = pair
    reference_km = Geodesic.WGS84.Inverse(lat1, lon1, lat2, lon2)["s12"] / 1000.0
    assert EARTH_RADIUS_KM * central_angle(lat1, lon1, lat2, lon2) == pytest.approx(reference_km, rel=5e-3)


def test_path_beyond_one_hop_is_refused_with_an_explanation() -> None:
    from ionotrail.harness.channel.geometry import PathError

    with pytest.raises(PathError, match="beyond the single-hop limit of 2187 km"):
        path_geometry(60.0, 10.0, 40.0, 20.0, 95.0)


def test_underdense_power_worked_example() -> None:
    # By hand from the forward-scatter equation: P_T 100 W, G_T = G_R = 5, lambda 6 m,
    # q 1e13, sin^2(alpha) 1, R1 = R2 = 500 km, cos^2(beta) 0.5, sin^2(phi) 0.9:
    # numerator 100 * 25 * 216 * (2.8179e-15)^2 * 1e26 = 428.8;
    # denominator 16 pi^2 * 2.5e11 * 1e6 * (1 - 0.45) = 2.171e19; P = 1.975e-17 W [der].
    power = physics.underdense_power(100, 5, 5, 6.0, 1e13, 1.0, 5e5, 5e5, 0.5, 0.9)
    assert float(power) == pytest.approx(1.975e-17, rel=2e-3)


def test_underdense_power_scales_as_q_squared_and_lambda_cubed() -> None:
    args = {"sin2_alpha": 1.0, "r1": 5e5, "r2": 5e5, "cos2_beta": 0.5, "sin2_phi": 0.9}
    p1 = float(physics.underdense_power(100, 5, 5, 6.0, 1e13, **args))
    assert float(physics.underdense_power(100, 5, 5, 6.0, 2e13, **args)) / p1 == pytest.approx(4.0)
    assert float(physics.underdense_power(100, 5, 5, 12.0, 1e13, **args)) / p1 == pytest.approx(8.0)
