"""The terminal's site over time: what the panel gives and how cold the battery is.

Harvest and temperature are piecewise constant over one-minute steps: the
harvest of a step is the panel's clear-sky plane-of-array irradiance
averaged over the step (:func:`~ionotrail.harness.energy.solar.step_means`,
so the step's energy is the continuous model's, not a sample's), times the
panel's peak power per 1000 W/m2, the system efficiency and the day's
cloudiness factor.  The battery integrates each step exactly, split further
wherever the terminal's load changes (:mod:`.meter`).

The cloudiness factor of a UTC day is a Beta draw with the scenario's mean
(concentration :data:`CLEARNESS_CONCENTRATION`), keyed by the seed and the
day's number since 1970, so a day's weather never depends on which days
were simulated before it.  Temperature follows a seasonal cosine peaking on
``warmest_day`` and a daily cosine peaking at 15:00 local solar time
(common practice, no source: a first-order climate for a site without a record).

Memory: the current day and the next are held (2 x 1440 steps).
"""

from __future__ import annotations

import math
from collections.abc import Iterator

import numpy as np
from ionotrail.harness.channel.scenario import Scenario
from ionotrail.harness.energy import solar

ENERGY_STREAM = 0x454E5247  # "ENRG": weather draws, apart from the trails' and the air's
STEP_S = 60.0
DAY_S = 86400.0
STEPS_PER_DAY = int(DAY_S / STEP_S)
CLEARNESS_CONCENTRATION = 4.0
"""a + b of the daily cloudiness Beta(a, b): days range from overcast to clear
with a broad spread (an invented climate; common practice, no source)."""
WARMEST_HOUR = 15.0


class Site:
    def __init__(self, scenario: Scenario) -> None:
        e = scenario.energy
        self.scenario = scenario
        self.energy = e
        self.lat, self.lon = scenario.terminal.lat_deg, scenario.terminal.lon_deg
        self.start_unix = scenario.start.timestamp()
        self.seed = scenario.seed
        self._watts_per_irradiance = e.panel_w / 1000.0 * e.system_efficiency
        self._days: dict[int, tuple[np.ndarray, np.ndarray]] = {}  # UTC day number -> (harvest W, temperature C) per step

    def clearness(self, day: int) -> float:
        """The cloudiness factor of UTC day ``day`` (days since 1970-01-01)."""
        mean = self.energy.clearness_mean
        if mean >= 1.0:
            return 1.0
        # a spawn key holds non-negative integers: days before 1970 take a key of their own shape
        key = (ENERGY_STREAM, day) if day >= 0 else (ENERGY_STREAM, -day, 1)
        rng = np.random.default_rng(np.random.SeedSequence(self.seed, spawn_key=key))
        return float(rng.beta(mean * CLEARNESS_CONCENTRATION, (1.0 - mean) * CLEARNESS_CONCENTRATION))

    def _day(self, day: int) -> tuple[np.ndarray, np.ndarray]:
        cached = self._days.get(day)
        if cached is not None:
            return cached
        e = self.energy
        start = day * DAY_S
        poa = solar.step_means(start, STEPS_PER_DAY, self.lat, self.lon, e.tilt_deg, e.azimuth_deg, e.albedo, step_s=STEP_S)
        harvest = poa * (self._watts_per_irradiance * self.clearness(day))
        mid = start + STEP_S * (np.arange(STEPS_PER_DAY) + 0.5)
        temperature = self._temperature(mid)
        for old in [d for d in self._days if d < day]:
            del self._days[old]
        self._days[day] = (harvest, temperature)
        return harvest, temperature

    def _temperature(self, unix: np.ndarray) -> np.ndarray:
        e = self.energy
        doy = (unix / DAY_S + 4.0) % 365.2425  # 1970-01-01 is day 1 of its year; close enough for a climate
        solar_hour = (unix / 3600.0 + self.lon / 15.0) % 24.0
        seasonal = e.temp_seasonal_c * np.cos(2 * math.pi * (doy - e.warmest_day) / 365.2425)
        daily = e.temp_daily_c * np.cos(2 * math.pi * (solar_hour - WARMEST_HOUR) / 24.0)
        return e.temp_mean_c + seasonal + daily

    def pieces(self, t0: float, t1: float) -> Iterator[tuple[float, float, float]]:
        """(seconds, harvest W, temperature C) of the steps covering [t0, t1)
        (seconds since the scenario's start), cut at t0 and t1.  Durations are
        differences of times since the start, so a 20 ms frame keeps its
        precision a year into a run."""
        start_unix, t = self.start_unix, t0
        while t < t1:
            unix = start_unix + t
            day = int(unix // DAY_S)
            harvest, temperature = self._day(day)
            k = min(STEPS_PER_DAY - 1, int((unix - day * DAY_S) // STEP_S))
            boundary = (day * DAY_S + (k + 1) * STEP_S) - start_unix
            if boundary <= t:  # rounding at a step's edge: on into the next step
                boundary += STEP_S
            end = min(t1, boundary)
            yield end - t, float(harvest[k]), float(temperature[k])
            t = end

    def forecast_w(self, t0: float, t1: float) -> float:
        """The terminal's own forecast of the mean harvest over [t0, t1), W: the
        clear-sky harvest times the climate's mean cloudiness factor (it cannot know
        the day's clouds)."""
        mean = self.energy.clearness_mean
        start_unix, energy, t = self.start_unix, 0.0, t0
        for seconds, harvest_w, _ in self.pieces(t0, t1):
            clearness = self.clearness(int((start_unix + t) // DAY_S))
            energy += seconds * (harvest_w / clearness * mean if clearness > 0 else 0.0)
            t += seconds
        return energy / (t1 - t0) if t1 > t0 else 0.0

    def harvest_wh(self, t0: float, t1: float) -> float:
        """The panel's energy offered over [t0, t1), Wh (used or not)."""
        return math.fsum(s * w for s, w, _ in self.pieces(t0, t1)) / 3600.0
