"""Formulas of meteor-burst propagation, noise and bit errors.

Each function is a published formula under its usual name; the tests check
them against the handbook values.  Functions take numpy arrays or floats.
Sources: forward-scatter equation (Eshleman 1955; Sugar, Proc. IEEE 52:116,
1964); diffusion and initial radius against height (CCIR Report 251);
galactic and man-made noise (ITU-R P.372); bit-error rates of the common
modulations (any digital-communications textbook).
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np
from numpy.typing import ArrayLike, NDArray

C = 299_792_458.0
"""Speed of light, m/s."""
R_E = 2.8179403262e-15
"""Classical electron radius, m."""
K_BOLTZMANN = 1.380649e-23
T0 = 290.0
"""Reference temperature of noise factors, K."""
KT0_DBM_HZ = 10 * math.log10(K_BOLTZMANN * T0 * 1000.0)
"""kT0 = -173.98 dBm/Hz."""
TRANSITION_Q = 2.4e14
"""Line density (electrons/m) between underdense and overdense trails (McKinley 1961)."""

Array = NDArray[np.float64]


def wavelength(mhz: float) -> float:
    return C / (mhz * 1e6)


def diffusion(height_km: ArrayLike) -> Array:
    """Ambipolar diffusion coefficient, m^2/s: log10 D = 0.067 h - 5.6."""
    return np.power(10.0, 0.067 * np.asarray(height_km, dtype=float) - 5.6)


def initial_radius(height_km: ArrayLike) -> Array:
    """Initial trail radius, m: log10 r0 = 0.035 h - 3.45."""
    return np.power(10.0, 0.035 * np.asarray(height_km, dtype=float) - 3.45)


def decay_constant(lam: float, sec2_phi: ArrayLike, d: ArrayLike) -> Array:
    """Underdense power decay constant tau = lambda^2 sec^2(phi) / (32 pi^2 D), s."""
    return lam**2 * np.asarray(sec2_phi) / (32 * math.pi**2 * np.asarray(d))


def initial_radius_factor(lam: float, sec2_phi: ArrayLike, r0: ArrayLike) -> Array:
    """Power loss to the initial radius: exp(-8 pi^2 r0^2 / (lambda^2 sec^2(phi)))."""
    return np.exp(-8 * math.pi**2 * np.asarray(r0) ** 2 / (lam**2 * np.asarray(sec2_phi)))


def overdense_duration(q: ArrayLike, lam: float, sec2_phi: ArrayLike, d: ArrayLike) -> Array:
    """Overdense duration T = r_e q lambda^2 sec^2(phi) / (4 pi^2 D), s."""
    return R_E * np.asarray(q) * lam**2 * np.asarray(sec2_phi) / (4 * math.pi**2 * np.asarray(d))


def underdense_power(
    p_t: float,
    g_t: float,
    g_r: float,
    lam: float,
    q: ArrayLike,
    sin2_alpha: ArrayLike,
    r1: ArrayLike,
    r2: ArrayLike,
    cos2_beta: ArrayLike,
    sin2_phi: ArrayLike,
) -> Array:
    """Peak forward-scatter power of an underdense trail, W (before the
    initial-radius factor):
    P_T G_T G_R lambda^3 r_e^2 q^2 sin^2(alpha) / (16 pi^2 R1 R2 (R1+R2) (1 - cos^2(beta) sin^2(phi)))."""
    r1, r2 = np.asarray(r1), np.asarray(r2)
    return (
        p_t * g_t * g_r * lam**3 * R_E**2 * np.asarray(q) ** 2 * np.asarray(sin2_alpha)
        / (16 * math.pi**2 * r1 * r2 * (r1 + r2) * (1 - np.asarray(cos2_beta) * np.asarray(sin2_phi)))
    )


def doppler_hz(wind_ms: ArrayLike, cos_phi: ArrayLike, lam: float) -> Array:
    """Doppler shift of a trail drifting at ``wind_ms``: f_D = 2 v cos(phi) / lambda."""
    return 2 * np.asarray(wind_ms) * np.asarray(cos_phi) / lam


def galactic_noise_db(mhz: float) -> float:
    """Galactic noise F_am = 52 - 23 log10 f(MHz), dB above kT0 (ITU-R P.372)."""
    return 52.0 - 23.0 * math.log10(mhz)


MAN_MADE = {"business": (76.8, 27.7), "residential": (72.5, 27.7), "rural": (67.2, 27.7), "quiet_rural": (53.6, 28.6)}
"""(c, d) of F_am = c - d log10 f for each environment (ITU-R P.372; from memory)."""


def man_made_noise_db(mhz: float, environment: str) -> float:
    c, d = MAN_MADE[environment]
    return c - d * math.log10(mhz)


def noise_density_dbm_hz(mhz: float, environment: str, noise_figure_db: float) -> float:
    """Noise power density at the receiver input: kT0 (f_galactic + f_man-made + f_receiver - 1)."""
    factor = 10 ** (galactic_noise_db(mhz) / 10) + 10 ** (man_made_noise_db(mhz, environment) / 10) + 10 ** (noise_figure_db / 10) - 1
    return KT0_DBM_HZ + 10 * math.log10(factor)


_erfc = np.frompyfunc(math.erfc, 1, 1)


def q_function(z: ArrayLike) -> Array:
    """Gaussian tail probability Q(z) = erfc(z / sqrt 2) / 2 (math.erfc, elementwise)."""
    return 0.5 * np.asarray(_erfc(np.asarray(z, dtype=float) / math.sqrt(2)), dtype=float)


def bit_error_rate(modulation: str, ebn0: ArrayLike) -> Array:
    """Bit-error rate at a linear Eb/N0."""
    x = np.maximum(np.asarray(ebn0, dtype=float), 0.0)
    if modulation == "bpsk":
        return q_function(np.sqrt(2 * x))
    if modulation == "dpsk":
        return 0.5 * np.exp(-x)
    if modulation == "coherent_fsk":
        return q_function(np.sqrt(x))
    if modulation == "noncoherent_fsk":
        return 0.5 * np.exp(-x / 2)
    raise ValueError(f"unknown modulation {modulation!r}")


def ber_function(modulation: str) -> Callable[[float], float]:
    """:func:`bit_error_rate` for one value at a time, with math instead of numpy
    (the link simulation asks once per frame sample; numpy's per-call cost dominates)."""
    erfc, exp, sqrt = math.erfc, math.exp, math.sqrt
    if modulation == "bpsk":
        return lambda x: 0.5 * erfc(sqrt(x)) if x > 0 else 0.5  # Q(sqrt(2x)) = erfc(sqrt x) / 2
    if modulation == "dpsk":
        return lambda x: 0.5 * exp(-x) if x > 0 else 0.5
    if modulation == "coherent_fsk":
        return lambda x: 0.5 * erfc(sqrt(x / 2)) if x > 0 else 0.5
    if modulation == "noncoherent_fsk":
        return lambda x: 0.5 * exp(-x / 2) if x > 0 else 0.5
    raise ValueError(f"unknown modulation {modulation!r}")


def threshold_ebn0(modulation: str, ber: float) -> float:
    """Linear Eb/N0 at which the bit-error rate equals ``ber`` (bisection in dB)."""
    low, high = -10.0, 40.0
    for _ in range(80):
        mid = (low + high) / 2
        if float(bit_error_rate(modulation, 10 ** (mid / 10))) > ber:
            low = mid
        else:
            high = mid
    return float(10 ** (high / 10))
