"""Clear-sky irradiance on a small photovoltaic panel at a terminal's site.

The chain, each step a published method under its usual name:

    sun_position           NOAA solar calculator, after Meeus   zenith and azimuth of the sun
    extraterrestrial_w_m2  Spencer (1971)                       normal irradiance above the atmosphere
    haurwitz_ghi           Haurwitz (1945)                      clear-sky global horizontal irradiance
    erbs                   Erbs, Klein and Duffie (1982)        its direct normal and diffuse parts
    plane_of_array         isotropic sky (Liu and Jordan)       what reaches the tilted panel
    clear_sky_poa          the chain at given instants
    step_means             its mean over each simulator step (Gauss-Legendre quadrature)

Each model keeps the defaults of the pvlib function of the same method, and
tests/test_solar.py checks it against that function.  pvlib is a test-only
dependency (it pulls in pandas and scipy); this module needs numpy alone.

Units: times are Unix seconds (UTC; Unix time has no leap seconds, and neither
does this model), angles degrees, irradiance W/m^2.  Azimuths run clockwise
from north, 0..360: a panel facing the equator in the northern hemisphere has
azimuth 180.  Tilt 0 is a flat panel, 90 a vertical one.
"""

from __future__ import annotations

import dataclasses
import math
import operator

import numpy as np
from numpy.typing import ArrayLike, NDArray

Array = NDArray[np.float64]

SOLAR_CONSTANT_W_M2 = 1366.1
"""W/m^2: pvlib's default for get_extra_radiation, read in its source."""

HAURWITZ_A_W_M2 = 1098.0
HAURWITZ_B = 0.059
"""GHI = 1098 cos z exp(-0.059 / cos z) (Haurwitz 1945; coefficients read in pvlib.clearsky.haurwitz)."""

ERBS_MIN_COS_ZENITH = 0.065
"""pvlib.irradiance.erbs default: cos z is held at 0.065 or more (z <= 86.27 deg) in the
clearness index, so kt does not blow up near the horizon."""
ERBS_MAX_ZENITH_DEG = 87.0
"""pvlib.irradiance.erbs default: beyond 87 deg the beam is set to 0 and all of GHI is diffuse."""
_COS_ERBS_MAX_ZENITH = math.cos(math.radians(ERBS_MAX_ZENITH_DEG))

PANEL_MAX_S = 60.0
"""step_means integrates over panels no longer than this, three Gauss-Legendre points each."""
_GAUSS_X, _GAUSS_W = np.polynomial.legendre.leggauss(3)  # on [-1, 1]: 0, +-sqrt(3/5); weights 8/9, 5/9
_CHUNK_PANELS = 1 << 13  # panels evaluated at once: 32k instants, 256 kB an array, in cache (1 << 16: 60 % slower)
_BISECTIONS = 30  # halves a 60 s panel to 5.6e-8 s, below the float spacing of a Unix time near 2027 (2.4e-7 s)

# Bits of the regime code: which side of each break of the integrand an instant is on.
# The chain is smooth in time between breaks; step_means splits a panel where its ends differ.
_BEYOND_MAX_ZENITH = 1  # Erbs: beam cut off (a jump of up to a few W/m^2)
_BELOW_MIN_COS = 2  # Erbs: clearness index uses the held cos z (a kink)
_KT_ABOVE_022 = 4  # Erbs: diffuse-fraction pieces (kinks; the pieces meet to 3e-4 in the fraction)
_KT_ABOVE_080 = 8
_SUN_IN_FRONT = 16  # the beam is clipped at 0 once the sun is behind the panel's plane (a kink)
_DAY_SHIFT = 5  # the UTC day above the bits: Spencer's day number steps at midnight UTC
_BIT_MASKS = (_BEYOND_MAX_ZENITH, _BELOW_MIN_COS, _KT_ABOVE_022, _KT_ABOVE_080, _SUN_IN_FRONT)
_DAY_MASK = ~((1 << _DAY_SHIFT) - 1)


# -- arguments ---------------------------------------------------------------------------------------------------


def _in_range(name: str, value: float, low: float, high: float, unit: str = " deg") -> float:
    number = float(value)
    if not low <= number <= high:  # also refuses nan
        raise ValueError(f"{name} {value!r} is outside [{low:g}, {high:g}]{unit}")
    return number


def _times(unix_s: ArrayLike) -> Array:
    t = np.asarray(unix_s, dtype=np.float64)
    if not np.all(np.isfinite(t)):
        bad = float(t[~np.isfinite(t)].flat[0])
        raise ValueError(f"unix_s holds a non-finite time: {bad!r}")
    return t


@dataclasses.dataclass(frozen=True)
class _Site:
    """A checked site and panel, with the trigonometry the chain needs."""

    sin_lat: float
    cos_lat: float
    lon_deg: float
    normal_east: float  # the panel's unit normal in east, north, up
    normal_north: float
    normal_up: float
    albedo: float

    @classmethod
    def checked(cls, lat: float, lon: float, tilt: float, panel_azimuth: float, albedo: float) -> _Site:
        lat_r = math.radians(_in_range("latitude", lat, -90.0, 90.0))
        lon_d = _in_range("longitude", lon, -180.0, 180.0)
        tilt_r = math.radians(_in_range("tilt", tilt, 0.0, 90.0))
        az_r = math.radians(_in_range("panel azimuth", panel_azimuth, 0.0, 360.0))
        rho = _in_range("albedo", albedo, 0.0, 1.0, unit="")
        return cls(
            math.sin(lat_r), math.cos(lat_r), lon_d,
            math.sin(tilt_r) * math.sin(az_r), math.sin(tilt_r) * math.cos(az_r), math.cos(tilt_r), rho,
        )


# -- the sun -----------------------------------------------------------------------------------------------------


def _sun_vector(t: Array, sin_lat: float, cos_lat: float, lon_deg: float) -> tuple[Array, Array, Array]:
    """Unit vector to the sun in local east, north, up, by the NOAA solar calculator.

    The steps are the columns of NOAA's solar calculator spreadsheet (NOAA
    Global Monitoring Laboratory; its equations after Meeus, Astronomical
    Algorithms, 1991), in its order and with its coefficients, which are
    written here from memory of the spreadsheet: Julian century, geometric
    mean longitude and anomaly, eccentricity, equation of centre, apparent
    longitude (aberration and nutation through omega), obliquity corrected by
    omega, declination, equation of time (its series in var y), true solar
    time, hour angle.  Rewritten only by identities: sin 2M, sin 3M and
    sin 4L0 from sin and cos of M and 2 L0, tan^2(e/2) = (1 - cos e) / (1 + cos e),
    sin and cos of the declination without the arcsine.

    NOAA documents it at about 0.01 deg for 1800-2100 (from memory).  Against
    NREL's SPA over 2027 (tests/test_solar.py) the zenith is within 0.015
    deg, most of it the truncated series for the equation of time (up to 2.8 s
    off SPA's, 0.012 deg of hour angle).  Time is UT throughout (no Delta T,
    about 70 s: 0.0008 deg of solar longitude).  Geometric: no refraction, no
    parallax (under 0.003 deg).
    """
    jc = (t / 86400.0 - 10957.5) / 36525.0  # Julian century: (JD - 2451545) / 36525, JD = t/86400 + 2440587.5
    l0 = (280.46646 + jc * (36000.76983 + jc * 0.0003032)) % 360.0  # geometric mean longitude of the sun, deg
    m = np.radians(357.52911 + jc * (35999.05029 - 0.0001537 * jc))  # geometric mean anomaly
    e = 0.016708634 - jc * (0.000042037 + 0.0000001267 * jc)  # eccentricity of the earth's orbit
    sin_m = np.sin(m)
    cos_m = np.cos(m)
    sin_2m = 2.0 * sin_m * cos_m
    sin_3m = sin_m * (3.0 - 4.0 * sin_m * sin_m)
    centre = (  # equation of centre, deg
        sin_m * (1.914602 - jc * (0.004817 + 0.000014 * jc)) + sin_2m * (0.019993 - 0.000101 * jc) + sin_3m * 0.000289
    )
    omega = np.radians(125.04 - 1934.136 * jc)  # longitude of the moon's ascending node: nutation and aberration
    apparent = np.radians(l0 + centre - 0.00569 - 0.00478 * np.sin(omega))  # apparent longitude
    mean_obliquity = 23.0 + (26.0 + (21.448 - jc * (46.815 + jc * (0.00059 - jc * 0.001813))) / 60.0) / 60.0
    obliquity = np.radians(mean_obliquity + 0.00256 * np.cos(omega))  # corrected obliquity
    cos_obl = np.cos(obliquity)
    sin_dec = np.sin(obliquity) * np.sin(apparent)  # declination
    cos_dec = np.sqrt(1.0 - sin_dec * sin_dec)
    y = (1.0 - cos_obl) / (1.0 + cos_obl)  # var y = tan^2(obliquity / 2)
    two_l0 = np.radians(2.0 * l0)
    sin_2l0 = np.sin(two_l0)
    cos_2l0 = np.cos(two_l0)
    equation_of_time = (  # radians (the spreadsheet's minutes are 4 * degrees of this)
        y * sin_2l0 - 2.0 * e * sin_m + 4.0 * e * y * sin_m * cos_2l0
        - 0.5 * y * y * 2.0 * sin_2l0 * cos_2l0 - 1.25 * e * e * sin_2m
    )
    # True solar time in degrees of rotation (1 deg per 240 s of UT), then the hour angle.
    hour_angle = np.radians((t % 86400.0) / 240.0 + lon_deg - 180.0) + equation_of_time
    cos_h = np.cos(hour_angle)
    east = -cos_dec * np.sin(hour_angle)
    north = sin_dec * cos_lat - cos_dec * sin_lat * cos_h
    up = sin_dec * sin_lat + cos_dec * cos_lat * cos_h
    return east, north, up


def sun_position(unix_s: ArrayLike, lat_deg: float, lon_deg: float) -> tuple[Array, Array]:
    """(zenith, azimuth) in degrees at each instant: geometric zenith (no refraction),
    azimuth clockwise from north in [0, 360).  The NOAA solar calculator (see
    _sun_vector); its zenith is the arccos, and its azimuth the arccos formula
    on the hour angle's side, of the same sun vector, computed here with atan2,
    which stays accurate near the zenith and the horizon."""
    t = _times(unix_s)
    lat_r = math.radians(_in_range("latitude", lat_deg, -90.0, 90.0))
    east, north, up = _sun_vector(t, math.sin(lat_r), math.cos(lat_r), _in_range("longitude", lon_deg, -180.0, 180.0))
    zenith = np.degrees(np.arctan2(np.hypot(east, north), up))
    azimuth = np.degrees(np.arctan2(east, north)) % 360.0
    return zenith, azimuth


# -- the sky -----------------------------------------------------------------------------------------------------


def _spencer(day_of_year: Array) -> Array:
    """Spencer (1971) Fourier series for (R0/R)^2, times the solar constant; as
    pvlib.irradiance.get_extra_radiation(method='spencer'), whose day angle is
    2 pi (day - 1) / 365 and whose coefficients these are (read in its source;
    J. W. Spencer, "Fourier series representation of the sun", Search 2, 172)."""
    b = (2.0 * math.pi / 365.0) * (day_of_year - 1.0)
    return SOLAR_CONSTANT_W_M2 * (
        1.00011 + 0.034221 * np.cos(b) + 0.00128 * np.sin(b) + 0.000719 * np.cos(2.0 * b) + 7.7e-05 * np.sin(2.0 * b)
    )


def _extra_by_day(day: NDArray[np.int64]) -> Array:
    """Spencer's irradiance for each UTC day number (days since 1970-01-01), read from a
    table over the span of days present (a year of minutes spans 366 days)."""
    if day.size == 0:
        return np.zeros(day.shape)
    first = int(day.min())
    span = np.arange(first, int(day.max()) + 1, dtype=np.int64).astype("datetime64[D]")
    day_of_year = (span - span.astype("datetime64[Y]").astype("datetime64[D]")).astype(np.int64) + 1
    return _spencer(day_of_year.astype(np.float64))[day - first]


def extraterrestrial_w_m2(unix_s: ArrayLike) -> Array:
    """Irradiance normal to the sun's rays above the atmosphere, W/m^2: Spencer (1971)
    with solar constant 1366.1 W/m^2, on the UTC calendar day of the year (1..366),
    as pvlib.irradiance.get_extra_radiation(times, method='spencer') takes it from
    a UTC DatetimeIndex.  It steps at midnight UTC, by at most 0.06 %."""
    t = _times(unix_s)
    return _extra_by_day(np.floor(t / 86400.0).astype(np.int64))


def _haurwitz(cos_z: Array) -> Array:
    up = cos_z > 0
    safe = np.where(up, cos_z, 1.0)
    return np.where(up, HAURWITZ_A_W_M2 * safe * np.exp(-HAURWITZ_B / safe), 0.0)


def haurwitz_ghi(zenith_deg: ArrayLike) -> Array:
    """Clear-sky global horizontal irradiance, W/m^2: 1098 cos z exp(-0.059 / cos z),
    0 when cos z <= 0 (Haurwitz 1945, "Insolation in relation to cloudiness and cloud
    density", J. Meteorology 2; as pvlib.clearsky.haurwitz).  Haurwitz fitted it to
    the apparent zenith; the chain gives it the geometric one, which differs by the
    refraction, about 0.5 deg at the horizon and under 0.03 deg above 30 deg
    elevation (from memory), where it changes GHI by under 0.1 %."""
    return _haurwitz(np.cos(np.radians(np.asarray(zenith_deg, dtype=np.float64))))


def _erbs(ghi: Array, cos_z: Array, beyond_max_zenith: NDArray[np.bool_], extra: Array) -> tuple[Array, Array, Array]:
    """(dni, dhi, kt); see erbs."""
    kt = np.minimum(np.maximum(ghi / (extra * np.maximum(cos_z, ERBS_MIN_COS_ZENITH)), 0.0), 1.0)
    diffuse_fraction = np.where(
        kt <= 0.22,
        1.0 - 0.09 * kt,
        np.where(kt <= 0.8, 0.9511 + kt * (-0.1604 + kt * (4.388 + kt * (-16.638 + kt * 12.336))), 0.165),
    )
    dhi = diffuse_fraction * ghi
    with np.errstate(divide="ignore", invalid="ignore"):  # cos z = 0 or below: the beam is discarded just below
        dni = (ghi - dhi) / cos_z
    bad = beyond_max_zenith | (ghi < 0) | (dni < 0)
    return np.where(bad, 0.0, dni), np.where(bad, ghi, dhi), kt


def erbs(ghi: ArrayLike, zenith_deg: ArrayLike, extra: ArrayLike) -> tuple[Array, Array]:
    """(dni, dhi) in W/m^2 from GHI: the Erbs, Klein and Duffie (1982) diffuse fraction
    (Solar Energy 28(4), 293-302, eq. 1), as pvlib.irradiance.erbs with its defaults:

      kt = GHI / (extra * max(cos z, 0.065)), clipped to [0, 1]
      DF = 1 - 0.09 kt                                                kt <= 0.22
           0.9511 - 0.1604 kt + 4.388 kt^2 - 16.638 kt^3 + 12.336 kt^4   0.22 < kt <= 0.8
           0.165                                                      kt > 0.8
      DHI = DF GHI,  DNI = (GHI - DHI) / cos z

    and where z > 87 deg, GHI < 0 or DNI < 0: DNI = 0 and DHI = GHI.  `extra` is the
    extraterrestrial irradiance (extraterrestrial_w_m2), which pvlib computes from
    the day of the year it is given."""
    g = np.asarray(ghi, dtype=np.float64)
    z = np.asarray(zenith_deg, dtype=np.float64)
    dni, dhi, _ = _erbs(g, np.cos(np.radians(z)), z > ERBS_MAX_ZENITH_DEG, np.asarray(extra, dtype=np.float64))
    return dni, dhi


def _poa(dni: Array, dhi: Array, ghi: Array, cos_incidence: Array, cos_tilt: float, albedo: float) -> Array:
    beam = np.maximum(dni * np.clip(cos_incidence, -1.0, 1.0), 0.0)
    return beam + dhi * (1.0 + cos_tilt) * 0.5 + ghi * albedo * (1.0 - cos_tilt) * 0.5


def plane_of_array(
    dni: ArrayLike, dhi: ArrayLike, ghi: ArrayLike, zenith: ArrayLike, azimuth: ArrayLike,
    tilt_deg: float, panel_azimuth_deg: float, albedo: float,
) -> Array:
    """Irradiance on the panel, W/m^2: beam + isotropic sky + ground reflection,

      DNI max(cos AOI, 0) + DHI (1 + cos tilt) / 2 + GHI albedo (1 - cos tilt) / 2
      cos AOI = cos tilt cos z + sin tilt sin z cos(azimuth - panel azimuth)

    (isotropic sky after Liu and Jordan, 1963 from memory; as the poa_global of
    pvlib.irradiance.get_total_irradiance(model='isotropic')).  The beam never
    counts negative: the sun behind the panel's plane gives no beam."""
    tilt = math.radians(_in_range("tilt", tilt_deg, 0.0, 90.0))
    panel_az = math.radians(_in_range("panel azimuth", panel_azimuth_deg, 0.0, 360.0))
    rho = _in_range("albedo", albedo, 0.0, 1.0, unit="")
    z = np.radians(np.asarray(zenith, dtype=np.float64))
    cos_incidence = math.cos(tilt) * np.cos(z) + math.sin(tilt) * np.sin(z) * np.cos(
        np.radians(np.asarray(azimuth, dtype=np.float64)) - panel_az
    )
    f = np.float64
    return _poa(np.asarray(dni, f), np.asarray(dhi, f), np.asarray(ghi, f), cos_incidence, math.cos(tilt), rho)


# -- the chain ---------------------------------------------------------------------------------------------------


def _chain(t: Array, site: _Site) -> tuple[Array, NDArray[np.int64]]:
    """Clear-sky plane-of-array irradiance at each instant, and its regime code."""
    east, north, up = _sun_vector(t, site.sin_lat, site.cos_lat, site.lon_deg)
    day = np.floor(t / 86400.0).astype(np.int64)
    ghi = _haurwitz(up)
    beyond = up < _COS_ERBS_MAX_ZENITH
    dni, dhi, kt = _erbs(ghi, up, beyond, _extra_by_day(day))
    cos_incidence = site.normal_east * east + site.normal_north * north + site.normal_up * up
    poa = _poa(dni, dhi, ghi, cos_incidence, site.normal_up, site.albedo)
    code = (
        (day << _DAY_SHIFT)
        | np.where(beyond, _BEYOND_MAX_ZENITH, 0)
        | np.where(up < ERBS_MIN_COS_ZENITH, _BELOW_MIN_COS, 0)
        | np.where(kt > 0.22, _KT_ABOVE_022, 0)
        | np.where(kt > 0.8, _KT_ABOVE_080, 0)
        | np.where(cos_incidence > 0, _SUN_IN_FRONT, 0)
    )
    return poa, code


def clear_sky_poa(
    unix_s: ArrayLike, lat: float, lon: float, tilt_deg: float, panel_azimuth_deg: float, albedo: float = 0.2
) -> Array:
    """Irradiance on the panel under a clear sky at each instant, W/m^2 (0 at night):
    sun_position, haurwitz_ghi, extraterrestrial_w_m2, erbs, plane_of_array."""
    site = _Site.checked(lat, lon, tilt_deg, panel_azimuth_deg, albedo)
    poa, _ = _chain(_times(unix_s), site)
    return poa


def _gauss(lo: Array, hi: Array, site: _Site) -> Array:
    """Three-point Gauss-Legendre integral of the chain over each [lo, hi] (any shape)."""
    half = 0.5 * (hi - lo)
    nodes = (0.5 * (hi + lo))[..., None] + half[..., None] * _GAUSS_X
    poa, _ = _chain(nodes.ravel(), site)
    return half * (poa.reshape(nodes.shape) @ _GAUSS_W)


def _split_panels(lo: Array, hi: Array, code_lo: NDArray[np.int64], code_hi: NDArray[np.int64], site: _Site) -> Array:
    """Integrals over panels whose ends lie in different regimes: every break that the
    ends disagree on is found by bisection, and each piece between breaks gets its
    own three points.  (Two crossings of one break within a panel, as when the sun
    grazes 87 deg at its lowest or highest, cancel in the ends and go unseen; the
    error is then at most the jump times the time between them.)"""
    if lo.size == 0:
        return np.zeros(0)
    changed = code_lo ^ code_hi
    rows_list, masks_list = [], []
    for mask in (*_BIT_MASKS, _DAY_MASK):
        rows = np.flatnonzero(changed & mask)
        rows_list.append(rows)
        masks_list.append(np.full(rows.size, mask, dtype=np.int64))
    rows = np.concatenate(rows_list)
    masks = np.concatenate(masks_list)
    a, b, side = lo[rows], hi[rows], code_lo[rows] & masks
    for _ in range(_BISECTIONS):
        mid = 0.5 * (a + b)
        _, code = _chain(mid, site)
        same = (code & masks) == side
        a = np.where(same, mid, a)
        b = np.where(same, b, mid)
    breaks = 0.5 * (a + b)
    order = np.lexsort((breaks, rows))
    rows, breaks = rows[order], breaks[order]
    counts = np.bincount(rows, minlength=lo.size)
    knots = np.repeat(hi[:, None], counts.max() + 2, axis=1)  # lo, the breaks in order, then hi repeated
    knots[:, 0] = lo
    knots[rows, np.arange(rows.size) - (np.cumsum(counts) - counts)[rows] + 1] = breaks
    result: Array = _gauss(knots[:, :-1], knots[:, 1:], site).sum(axis=1)
    return result


def _smooth_panels(edges: Array, site: _Site) -> tuple[Array, NDArray[np.intp], NDArray[np.int64]]:
    """Three-point integrals over the panels between consecutive edges; the indices of
    the panels whose ends lie in different regimes, and the codes of all the edges."""
    lo, hi = edges[:-1], edges[1:]
    half = 0.5 * (hi - lo)
    nodes = (0.5 * (hi + lo))[:, None] + half[:, None] * _GAUSS_X
    poa, code = _chain(np.concatenate([edges, nodes.ravel()]), site)
    n = lo.size
    ends = code[: n + 1]
    return half * (poa[n + 1 :].reshape(n, 3) @ _GAUSS_W), np.flatnonzero(ends[:-1] != ends[1:]), ends


def step_means(
    start_unix: float, steps: int, lat: float, lon: float, tilt_deg: float, panel_azimuth_deg: float,
    albedo: float = 0.2, step_s: float = 60.0,
) -> Array:
    """Mean clear-sky irradiance on the panel over each of `steps` consecutive
    intervals of `step_s` seconds from `start_unix`, W/m^2 (times step_s: J/m^2).

    Each interval is cut into panels of at most PANEL_MAX_S (60 s), each integrated
    by three-point Gauss-Legendre quadrature, exact for polynomials of degree 5;
    its remainder is h^7 f^(6) / 2,016,000 over a panel of h seconds (the
    standard Gauss-Legendre remainder [der]), so for a function varying on a
    time scale T it is about (h / T)^6 / 2e6 of the value.  Between the breaks
    listed below the chain is smooth and varies on the scale of hours, or of
    ten minutes or more just after sunrise and before sunset, where Haurwitz's
    exp(-0.059 / cos z) climbs from 0 (about 7 W/m^2 at 2 deg elevation): with
    h = 60 s that is under 1e-12.  Sunrise itself needs nothing: GHI leaves 0
    with every derivative 0, and is tiny there.  The breaks are elsewhere: Erbs's cut-off of the beam at 87 deg
    (a jump of up to a few W/m^2), kinks where its clearness index is held and
    where its diffuse fraction changes piece, the kink where the sun passes
    behind the panel's plane (the beam clipped at 0, possibly hundreds of W/m^2
    of beam), and the step of Spencer's day number at midnight UTC.  Each
    instant carries a code of which side of each break it is on; a panel whose
    ends differ is split where the code changes (found by bisection) and each
    piece is integrated on its own, so intervals spanning sunrise, sunset or any
    break are exact to the same order as the rest.  (Without the split, the
    minute holding the 87-deg jump is off by up to 0.65 W/m^2 of about 15.)
    tests/test_solar.py: minutes across each break within 1e-4 W/m^2 of a fine
    trapezoid integral, days within 3e-8 of one, both the trapezoid's own error.

    Speed: a year of one-minute intervals (525,600) takes 0.38 s on one core of
    the development machine (an Intel Xeon, numpy 2.4), the same at five sites
    and panels: 2.1 million evaluations of the chain (three nodes and one end
    per panel), most of it the sun's position, in chunks of 8192 panels that
    stay in cache; the panels to split (about 2,900 a year, 8 a day) are
    bisected together at the end, 30 more calls on small arrays.  Measured as
    timeit of step_means(1798761600, 525600, 45.3, 7.1, 30, 180), best of 5.
    """
    try:
        count = -1 if isinstance(steps, bool) else operator.index(steps)
    except TypeError:
        count = -1
    if count < 0:
        raise ValueError(f"steps {steps!r} is not a whole number of intervals, 0 or more")
    step = float(step_s)
    if not (math.isfinite(step) and step > 0):
        raise ValueError(f"step_s {step_s!r} is not a positive number of seconds")
    start = float(start_unix)
    if not math.isfinite(start):
        raise ValueError(f"start_unix {start_unix!r} is not a finite time")
    site = _Site.checked(lat, lon, tilt_deg, panel_azimuth_deg, albedo)
    per_step = max(1, math.ceil(step / PANEL_MAX_S))
    panel_s = step / per_step
    steps_per_chunk = max(1, _CHUNK_PANELS // per_step)
    means = np.empty(count)
    # Panels to split are gathered over all chunks and bisected together: a few per day.
    split_step, split_lo, split_hi, split_codes, split_smooth = [], [], [], [], []
    for first in range(0, count, steps_per_chunk):
        n = min(steps_per_chunk, count - first)
        panel = np.arange(first * per_step, (first + n) * per_step + 1, dtype=np.int64)
        edges = start + panel_s * panel.astype(np.float64)
        integrals, split, codes = _smooth_panels(edges, site)
        means[first : first + n] = integrals.reshape(n, per_step).sum(axis=1) / step
        split_step.append(panel[split] // per_step)
        split_lo.append(edges[split])
        split_hi.append(edges[split + 1])
        split_codes.append(np.stack([codes[split], codes[split + 1]]))
        split_smooth.append(integrals[split])
    if split_step:
        codes = np.concatenate(split_codes, axis=1)
        exact = _split_panels(np.concatenate(split_lo), np.concatenate(split_hi), codes[0], codes[1], site)
        np.add.at(means, np.concatenate(split_step), (exact - np.concatenate(split_smooth)) / step)
    return means
