"""When meteors arrive: the sporadic diurnal and seasonal cycles, and showers.

Sporadic rates peak near 06 h and bottom near 18 h local solar time with a
max/min ratio of about 4, and in the northern hemisphere bottom in February
and peak in July (ITU-R P.843).  Showers add rate only while their radiant
is above the horizon, in proportion to the sine of its elevation.  Times
are seconds since the Unix epoch (UTC); angles in degrees.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
from numpy.typing import NDArray

DIURNAL_AMPLITUDE = 0.6
"""Rate = 1 + 0.6 cos(2 pi (t_local - 6 h) / 24 h): max/min = 1.6/0.4 = 4 (ITU-R P.843)."""
SEASONAL_AMPLITUDE = 0.5
"""Seasonal swing of +-50 % (max/min 3), rising from mid-February to mid-July."""
SEASON_MIN_DAY = 45.0  # day of the year (0 = 1 January) of the minimum: 15 February, northern hemisphere
SEASON_MAX_DAY = 196.0  # of the maximum: 16 July

Array = NDArray[np.float64]


def local_solar_hours(unix_s: Array, lon_deg: float) -> Array:
    """Local mean solar time, hours (the equation of time, under 17 min, is ignored)."""
    return np.mod(unix_s / 3600.0 + lon_deg / 15.0, 24.0)


def day_of_year(unix_s: Array) -> Array:
    """Fractional day of a mean year of 365.2422 days counted from 2000-01-01 00 UTC
    (0 = 1 January); it drifts from the calendar by up to about 0.75 day between
    leap years, which the seasonal cycle and shower profiles do not notice."""
    days = unix_s / 86400.0 - 10957.0  # days since 2000-01-01
    return np.mod(days, 365.2422)


def diurnal_factor(unix_s: Array, lon_deg: float) -> Array:
    return 1.0 + DIURNAL_AMPLITUDE * np.cos(2 * math.pi * (local_solar_hours(unix_s, lon_deg) - 6.0) / 24.0)


def seasonal_factor(unix_s: Array, lat_deg: float) -> Array:
    """Piecewise-cosine year: minimum mid-February, maximum mid-July; mirrored south."""
    day = day_of_year(unix_s)
    if lat_deg < 0:
        day = np.mod(day + 365.2422 / 2, 365.2422)
    rise = SEASON_MAX_DAY - SEASON_MIN_DAY
    fall = 365.2422 - rise
    since_min = np.mod(day - SEASON_MIN_DAY, 365.2422)
    phase = np.where(since_min < rise, since_min / rise, 1.0 + (since_min - rise) / fall)  # 0..2
    return 1.0 - SEASONAL_AMPLITUDE * np.cos(math.pi * phase)


@dataclasses.dataclass(frozen=True)
class Shower:
    name: str
    peak_day: float
    """Day of year of the peak (0 = 1 January)."""
    width_days: float
    """e-folding half-width of the activity profile, days."""
    strength: float
    """Peak rate as a multiple of the annual mean sporadic rate, radiant at the zenith."""
    ra_deg: float
    dec_deg: float
    mass_index: float = 2.0


# Major annual showers: peak dates and radiants from memory of the
# International Meteor Organization's shower calendar; strengths scaled from
# their zenithal hourly rates (ZHR / 15, so the Geminids reach about ten
# times the sporadic rate, the most a shower is seen to add).  Widths are
# e-folding half-widths of the activity profile.
SHOWERS: tuple[Shower, ...] = (
    Shower("quadrantids", 2.7, 0.4, 110 / 15, 230.0, 49.0, 2.1),
    Shower("lyrids", 111.5, 0.8, 18 / 15, 271.0, 34.0, 2.1),
    Shower("eta_aquariids", 125.5, 3.0, 50 / 15, 338.0, -1.0, 2.4),
    Shower("daytime_arietids", 157.0, 3.0, 60 / 15, 44.0, 24.0, 2.0),
    Shower("perseids", 223.5, 1.5, 100 / 15, 48.0, 58.0, 2.2),
    Shower("orionids", 293.5, 2.0, 20 / 15, 95.0, 16.0, 2.5),
    Shower("leonids", 320.5, 1.0, 15 / 15, 152.0, 22.0, 2.5),
    Shower("geminids", 347.5, 1.0, 150 / 15, 112.0, 33.0, 2.6),
)


def gmst_deg(unix_s: Array) -> Array:
    """Greenwich mean sidereal time, degrees (Meeus, Astronomical Algorithms, eq. 12.4)."""
    jd = unix_s / 86400.0 + 2440587.5
    return np.mod(280.46061837 + 360.98564736629 * (jd - 2451545.0), 360.0)


def radiant_sin_elevation(unix_s: Array, ra_deg: float, dec_deg: float, lat_deg: float, lon_deg: float) -> Array:
    """sin(elevation) of a radiant seen from (lat, lon)."""
    hour_angle = np.radians(gmst_deg(unix_s) + lon_deg - ra_deg)
    lat, dec = math.radians(lat_deg), math.radians(dec_deg)
    return math.sin(lat) * math.sin(dec) + math.cos(lat) * math.cos(dec) * np.cos(hour_angle)


def shower_activity(unix_s: Array, shower: Shower, lat_deg: float, lon_deg: float) -> Array:
    """Shower rate as a multiple of the mean sporadic rate (zero with the radiant down)."""
    delta = np.mod(day_of_year(unix_s) - shower.peak_day + 182.6211, 365.2422) - 182.6211
    profile = np.exp(-np.abs(delta) / shower.width_days)
    elevation = radiant_sin_elevation(unix_s, shower.ra_deg, shower.dec_deg, lat_deg, lon_deg)
    return shower.strength * profile * np.maximum(elevation, 0.0)
