"""The seeded meteor-burst channel between two stations.

:class:`TrailSet` generates every trail of a period in vectorised numpy:
Poisson arrivals (thinned from a bounding rate) whose rate follows the
sporadic diurnal and seasonal cycles and the showers; per trail a height,
diffusion coefficient, initial radius, line density from the cumulative
flux law, a reflection point and an orientation, and from those, per
direction, the peak signal-to-noise ratio per bit, the decay constant, the
time open above threshold and the Doppler shift (the trail's own: the
offset between the stations' oscillators is the air's to add).
:class:`Channel` answers the questions a link simulation asks: is the path
open at t and until when, what SNR does a frame see, did it get through.

Simplifications, each documented in docs/channel.md: every sampled trail is
taken as specular for the pair (an effective collecting area stands for the
fraction that is); antenna patterns are flat over the collecting area;
overdense peak power is matched to the underdense equation at the transition
and grows as q^(1/2) above it; overdense fading is a seeded two-ray process.
"""

from __future__ import annotations

import bisect
import copy
import dataclasses
import functools
import math
from collections.abc import Callable, Iterator

import numpy as np
from ionotrail.harness.channel import physics, sky
from ionotrail.harness.channel.geometry import EARTH_RADIUS_KM, PathGeometry, path_geometry
from ionotrail.harness.channel.scenario import Scenario, Station
from numpy.typing import NDArray

Array = NDArray[np.float64]


def _norm(v: Array) -> Array:
    """Row lengths of an (n, 3) array (faster than numpy.linalg.norm here)."""
    return np.sqrt(np.einsum("ij,ij->i", v, v))


def exclusive_open(start: Array, length: Array) -> Array:
    """Each opening's time not already covered by an earlier one (starts sorted):
    summing these gives the length of the union, so overlapping trails are not
    counted twice in duty cycles and capacity."""
    end = start + length
    earlier = np.maximum.accumulate(np.concatenate([[-np.inf], end[:-1]]))
    return np.maximum(0.0, end - np.maximum(start, earlier))


FLUX_AT_1E14 = 160.0 / 1e14
"""Cumulative flux of sporadic meteors with q > 1e14 e/m, per m^2 per s, annual
mean (ITU-R P.843: I(q > q0) = 160 / q0); other mass indices scale from it."""
BOX_ALONG_KM = 300.0
BOX_ACROSS_KM = 300.0
"""Reflection points are drawn over a 300 x 300 km box centred on the path midpoint."""
SPECULAR_FRACTION = 0.2
"""Share of trails over the box whose orientation gives a specular reflection
for the pair.  Calibrated (common practice, no source) so that a 100-500 W
link near 40 MHz over 1000 km sees a few usable bursts a minute and a duty
cycle of a few per cent, the figures fielded links report."""
HEIGHT_SPREAD_KM = 4.0
DIFFUSION_SCATTER_DEX = 0.1
"""Per-trail scatter of log10 D about the height relation (measured amplitude and
decay distributions are wider than the classical ones: Weitzen et al. 1988)."""
WIND_MS = (10.0, 100.0)
"""Trail drift winds, m/s (from memory of the meteor-wind literature)."""
OVERDENSE_HOLD_MAX_S = 15.0
FADED_TAUS = 40.0  # past this many decay constants a trail no longer matters to a frame
"""Wind shear breaks up long overdense trails: the plateau is capped at 15 s
(common practice, no source; without a cap the q^-1 flux law gives a mean
overdense duration that grows without bound)."""
RATE_GRID_S = 300.0
"""Rates are evaluated on a 5-minute grid and interpolated."""

UNDERDENSE, OVERDENSE = 0, 1
DIRECTIONS = ("up", "down")


@dataclasses.dataclass(frozen=True)
class DirectionParams:
    """One direction of the link: who transmits, who receives, at what frequency."""

    name: str
    lam: float
    p_t: float
    g_t: float
    g_r: float
    tx: Station
    rx: Station
    n0_w_hz: float
    ebn0_threshold: float
    bit_rate: float
    mhz: float


def _direction(name: str, mhz: float, tx: Station, rx: Station, s: Scenario) -> DirectionParams:
    n0_dbm = physics.noise_density_dbm_hz(mhz, rx.environment, rx.noise_figure_db)
    return DirectionParams(
        name,
        physics.wavelength(mhz),
        tx.tx_power_w,
        10 ** (tx.gain_dbi / 10),
        10 ** (rx.gain_dbi / 10),
        tx,
        rx,
        10 ** ((n0_dbm - 30) / 10),
        physics.threshold_ebn0(s.modulation, s.threshold_ber),
        s.bit_rate,
        mhz,
    )


@dataclasses.dataclass
class Trails:
    """Columns of a set of trails, one element per trail, sorted by time."""

    t: Array  # seconds from scenario start
    kind: NDArray[np.int16]  # 0 underdense, 1 overdense, 2 + i: shower i
    height_km: Array
    q: Array
    overdense: NDArray[np.bool_]
    peak_ebn0: dict[str, Array]  # linear, at the scenario bit rate
    tau: dict[str, Array]
    hold: dict[str, Array]  # overdense plateau before the decay, s (0 underdense)
    open_s: dict[str, Array]
    doppler_hz: dict[str, Array]
    fade_depth: Array
    fade_hz: Array
    fade_phase: Array

    def __len__(self) -> int:
        return len(self.t)

    def select(self, mask: NDArray[np.bool_]) -> Trails:
        def pick(v: object) -> object:
            if isinstance(v, dict):
                return {k: a[mask] for k, a in v.items()}
            return v[mask]  # type: ignore[index]

        return Trails(**{f.name: pick(getattr(self, f.name)) for f in dataclasses.fields(self)})  # type: ignore[arg-type]

    @staticmethod
    def concatenate(parts: list[Trails]) -> Trails:
        first = parts[0]
        out = {}
        for f in dataclasses.fields(first):
            v = getattr(first, f.name)
            if isinstance(v, dict):
                out[f.name] = {k: np.concatenate([getattr(p, f.name)[k] for p in parts]) for k in v}
            else:
                out[f.name] = np.concatenate([getattr(p, f.name) for p in parts])
        return Trails(**out)  # type: ignore[arg-type]


CELL_S = 21600.0
"""Trails are drawn six hours at a time, each cell from its own keyed stream
(``SeedSequence(seed, spawn_key=(TRAIL_STREAM, cell))``): a cell's trails
are the same whichever window asks for them, in whatever order, and
whatever the period's length (a cell past the period's end is drawn whole
and cut)."""
WINDOW_S = 86400.0
"""Default window a simulation holds in memory: a day (a whole number of cells)."""
TRAIL_STREAM = 0x54524C53  # "TRLS"
SEARCH_STREAM = 0x514D494E  # "QMIN"


class TrailSet:
    """The trails of a scenario's period, drawn cell by cell from its seed.

    Nothing is drawn at construction.  :meth:`windows` yields the period
    window by window (memory stays that of a window, however long the
    period); :attr:`trails` holds the whole period at once, for short runs,
    reports and plots.  Both give the same trails whatever ``window_s``.
    """

    def __init__(self, scenario: Scenario, keep: str = "usable", progress: Callable[[float], None] | None = None,
                 window_s: float = WINDOW_S) -> None:  # fmt: skip
        """``keep``: "usable" keeps trails open in either direction, "all" keeps every trail drawn.
        ``progress`` hears the fraction of the period drawn when :attr:`trails` is built."""
        if keep not in ("usable", "all"):
            raise ValueError(f"keep must be 'usable' or 'all', not {keep!r}")
        cells = window_s / CELL_S
        if not (cells >= 1 and cells == int(cells)):
            raise ValueError(f"window of {window_s:g} s is not a whole number of {CELL_S:g}-s cells")
        self.scenario = scenario
        self.keep = keep
        self.window_s = float(window_s)
        self.progress = progress
        t, m = scenario.terminal, scenario.master
        self.geometry: PathGeometry = path_geometry(t.lat_deg, t.lon_deg, m.lat_deg, m.lon_deg, scenario.reflection_height_km)
        self.directions = {
            "up": _direction("up", scenario.up_mhz, t, m, scenario),
            "down": _direction("down", scenario.down_mhz, m, t, scenario),
        }
        self.start_unix = scenario.start.timestamp()
        self.duration_s = scenario.duration_s
        self._setup_frame()
        self.q_min = self._minimum_useful_q()
        self._fixed: Trails | None = None  # hand-made trails (with_openings) replace the draws
        self._all: Trails | None = None
        self._generated: int | None = None

    # --- the period, window by window ------------------------------------------------

    @property
    def window_count(self) -> int:
        if self._fixed is not None:
            return 1
        return max(1, math.ceil(self.duration_s / self.window_s))

    def window_bounds(self, w: int) -> tuple[float, float]:
        """[start, end) of window ``w`` in seconds from the scenario's start."""
        if self._fixed is not None:
            return 0.0, math.inf
        return w * self.window_s, min(self.duration_s, (w + 1) * self.window_s)

    def window(self, w: int) -> Trails:
        """The kept trails of window ``w`` (drawn now, not cached)."""
        return self.draw_window(w)[0]

    def windows(self, first: int = 0) -> Iterator[tuple[int, Trails]]:
        """(index, trails) of every window from ``first`` on, in order."""
        for w in range(first, self.window_count):
            yield w, self.window(w)

    def draw_window(self, w: int) -> tuple[Trails, int]:
        """(kept trails, trails drawn) of window ``w``."""
        if self._fixed is not None:
            return self._fixed, len(self._fixed)
        start, end = self.window_bounds(w)
        parts, drawn = [], 0
        for cell in range(int(start // CELL_S), math.ceil(end / CELL_S)):
            trails = self._cell(cell)
            if (cell + 1) * CELL_S > self.duration_s:
                trails = trails.select(trails.t < self.duration_s)
            drawn += len(trails)
            if self.keep == "usable":
                trails = trails.select((trails.open_s["up"] > 0) | (trails.open_s["down"] > 0))
            parts.append(trails)
        return Trails.concatenate(parts), drawn

    def _cell(self, cell: int) -> Trails:
        rng = np.random.default_rng(np.random.SeedSequence(self.scenario.seed, spawn_key=(TRAIL_STREAM, cell)))
        return self._generate(rng, cell * CELL_S, (cell + 1) * CELL_S)

    # --- the whole period at once ------------------------------------------------------

    @property
    def trails(self) -> Trails:
        """Every kept trail of the period (built on first use and kept)."""
        if self._all is None:
            parts, drawn = [], 0
            for w in range(self.window_count):
                trails, count = self.draw_window(w)
                parts.append(trails)
                drawn += count
                if self.progress:
                    self.progress(min(1.0, self.window_bounds(w)[1] / self.duration_s))
            self._all, self._generated = Trails.concatenate(parts), drawn
        return self._all

    @trails.setter
    def trails(self, value: Trails) -> None:
        self._fixed = self._all = value
        self._generated = len(value)

    def with_window(self, window_s: float) -> TrailSet:
        """This set with windows of ``window_s``: the same trails, drawn in other portions."""
        if self._fixed is not None:
            return self
        out = TrailSet(self.scenario, keep=self.keep, progress=self.progress, window_s=window_s)
        out._all, out._generated = self._all, self._generated
        return out

    def fixed(self, trails: Trails) -> TrailSet:
        """A copy of this set (scenario, geometry) whose trails are exactly ``trails``, in one window."""
        out = copy.copy(self)
        out.trails = trails
        return out

    @property
    def generated(self) -> int:
        """Trails drawn over the period, kept or not."""
        if self._generated is None:
            self.trails  # noqa: B018 -- builds the period and counts its draws
        assert self._generated is not None
        return self._generated

    # --- geometry ------------------------------------------------------------------

    def _setup_frame(self) -> None:
        """Earth-centred frame with the path in the x-z plane and the midpoint on z."""
        r = EARTH_RADIUS_KM * 1000.0
        half = self.geometry.distance_km / EARTH_RADIUS_KM / 2
        t, m = self.scenario.terminal, self.scenario.master
        self.pos = {
            "terminal": (r + t.height_m) * np.array([-math.sin(half), 0.0, math.cos(half)]),
            "master": (r + m.height_m) * np.array([math.sin(half), 0.0, math.cos(half)]),
        }

    @staticmethod
    def _points(rng: np.random.Generator, n: int, height_km: Array) -> Array:
        along = rng.uniform(-BOX_ALONG_KM / 2, BOX_ALONG_KM / 2, n) / EARTH_RADIUS_KM
        across = rng.uniform(-BOX_ACROSS_KM / 2, BOX_ACROSS_KM / 2, n) / EARTH_RADIUS_KM
        radius = (EARTH_RADIUS_KM + height_km) * 1000.0
        return np.stack(
            [radius * np.sin(along) * np.cos(across), radius * np.sin(across), radius * np.cos(along) * np.cos(across)],
            axis=1,
        )

    def _scatter_geometry(self, points: Array, axis: Array) -> dict[str, Array]:
        to_t = self.pos["terminal"] - points
        to_m = self.pos["master"] - points
        r1 = _norm(to_t)
        r2 = _norm(to_m)
        cos_2phi = np.einsum("ij,ij->i", to_t, to_m) / (r1 * r2)
        phi = 0.5 * np.arccos(np.clip(cos_2phi, -1.0, 1.0))
        normal = np.cross(to_t, to_m)
        normal /= _norm(normal)[:, None]
        sin_beta = np.einsum("ij,ij->i", axis, normal)
        out = {
            "r1": r1,
            "r2": r2,
            "sin2_phi": np.sin(phi) ** 2,
            "sec2_phi": 1.0 / np.cos(phi) ** 2,
            "cos2_beta": 1.0 - sin_beta**2,
        }
        out["sin2_alpha_up"] = self._sin2_alpha("terminal", -to_t / r1[:, None], to_m / r2[:, None])
        out["sin2_alpha_down"] = self._sin2_alpha("master", -to_m / r2[:, None], to_t / r1[:, None])
        return out

    def _sin2_alpha(self, tx: str, ray: Array, to_rx: Array) -> Array:
        """sin^2 of the angle between the incident E-field and the direction to the
        receiver; ``ray`` and ``to_rx`` are unit vectors (transmitter to trail, trail to receiver)."""
        station = self.directions["up" if tx == "terminal" else "down"].tx
        vertical = self.pos[tx] / np.linalg.norm(self.pos[tx])
        horizontal = np.cross(vertical, ray)
        horizontal /= _norm(horizontal)[:, None]
        e_field = horizontal if station.polarisation == "horizontal" else np.cross(ray, horizontal)
        cos_alpha = np.einsum("ij,ij->i", e_field, to_rx)
        return 1.0 - cos_alpha**2

    # --- physics -----------------------------------------------------------------------

    def _ebn0_per_q2(self, d: DirectionParams, g: dict[str, Array], r0: Array) -> Array:
        """Underdense peak Eb/N0 divided by q^2, including the initial-radius loss."""
        power = physics.underdense_power(
            d.p_t, d.g_t, d.g_r, d.lam, 1.0, g[f"sin2_alpha_{d.name}"], g["r1"], g["r2"], g["cos2_beta"], g["sin2_phi"]
        )
        return power * physics.initial_radius_factor(d.lam, g["sec2_phi"], r0) / (d.n0_w_hz * d.bit_rate)

    def _minimum_useful_q(self) -> float:
        """A line density below which no trail anywhere in the box can open either direction."""
        n = 16384
        heights = np.full(n, 80.0)
        rng = np.random.default_rng(np.random.SeedSequence(self.scenario.seed, spawn_key=(SEARCH_STREAM,)))
        points = self._points(rng, n, heights)
        best = {}
        for d in self.directions.values():
            g = self._scatter_geometry(points, np.zeros((n, 3)))  # axis normal to the plane: cos^2 beta = 1
            g[f"sin2_alpha_{d.name}"] = np.ones(n)
            best[d.name] = float(np.max(self._ebn0_per_q2(d, g, physics.initial_radius(heights) * 0)))
        need = min(math.sqrt(d.ebn0_threshold / best[d.name]) for d in self.directions.values())
        return 0.85 * need  # margin: the search samples the box rather than scanning it

    def _active_showers(self, start: float, end: float) -> list[int]:
        """Showers whose activity profile matters in [start, end) (above e^-12 of peak)."""
        if not self.scenario.showers:
            return []
        days = sky.day_of_year(self.start_unix + np.array([start, end]))
        span = (end - start) / 86400.0
        active = []
        for i, shower in enumerate(sky.SHOWERS):
            gap = float(np.mod(shower.peak_day - days[0] + 182.6211, 365.2422) - 182.6211)
            if -12 * shower.width_days - span <= gap <= 12 * shower.width_days + span:
                active.append(i)
        return active

    def _rate(self, unix_s: Array, showers_on: list[int]) -> tuple[Array, list[Array]]:
        """Sporadic and per-shower rates of trails with q > q_min, per second."""
        s = self.scenario
        lat, lon = self.geometry.midpoint
        area = BOX_ALONG_KM * BOX_ACROSS_KM * 1e6 * SPECULAR_FRACTION
        flux = FLUX_AT_1E14 * (1e14 / self.q_min) ** (s.mass_index - 1)
        sporadic = flux * area * s.sporadic_scale * sky.diurnal_factor(unix_s, lon) * sky.seasonal_factor(unix_s, lat)
        showers = []
        for i in showers_on:
            shower = sky.SHOWERS[i]
            shower_flux = FLUX_AT_1E14 * (1e14 / self.q_min) ** (shower.mass_index - 1)
            showers.append(shower_flux * area * s.sporadic_scale * sky.shower_activity(unix_s, shower, lat, lon))
        return sporadic, showers

    def _generate(self, rng: np.random.Generator, start: float, end: float) -> Trails:
        # Thinning: candidates at a bounding rate, each kept with probability
        # rate / bound.  Rates are evaluated on a 5-minute grid and interpolated
        # (the cycles vary over hours; the error is below 0.1 %).
        showers_on = self._active_showers(start, end)
        grid_s = np.linspace(start, end, max(2, int((end - start) / RATE_GRID_S) + 1))
        sporadic, showers = self._rate(self.start_unix + grid_s, showers_on)
        grid_rates = np.vstack([sporadic, *showers]) if showers else sporadic[None, :]
        bound = float(grid_rates.sum(axis=0).max())
        count = rng.poisson(bound * (end - start))
        t = np.sort(rng.uniform(start, end, count))
        components = np.vstack([np.interp(t, grid_s, row) for row in grid_rates])
        total = components.sum(axis=0)
        keep = rng.random(count) * bound < total
        t, components, total = t[keep], components[:, keep], total[keep]
        n = len(t)
        # Which population each trail belongs to, in proportion to the rates at its time.
        pick = rng.random(n) * total
        source = np.argmax(np.cumsum(components, axis=0) > pick, axis=0)
        index = np.array([self.scenario.mass_index] + [sky.SHOWERS[i].mass_index for i in showers_on])
        s_index = index[source]
        q = self.q_min * rng.random(n) ** (-1.0 / (s_index - 1.0))
        height = np.clip(rng.normal(self.scenario.reflection_height_km, HEIGHT_SPREAD_KM, n), 80.0, 115.0)
        d_coef = physics.diffusion(height) * 10 ** rng.normal(0.0, DIFFUSION_SCATTER_DEX, n)
        r0 = physics.initial_radius(height)
        points = self._points(rng, n, height)
        axis = rng.normal(size=(n, 3))
        axis /= _norm(axis)[:, None]
        g = self._scatter_geometry(points, axis)
        overdense = q >= physics.TRANSITION_Q
        wind = rng.uniform(*WIND_MS, n) * rng.choice([-1.0, 1.0], n)
        peak, tau, hold, open_s, doppler = {}, {}, {}, {}, {}
        for d in self.directions.values():
            per_q2 = self._ebn0_per_q2(d, g, r0)
            q_eff = np.where(overdense, physics.TRANSITION_Q, q)
            peak[d.name] = per_q2 * q_eff**2 * np.where(overdense, np.sqrt(q / physics.TRANSITION_Q), 1.0)
            tau[d.name] = physics.decay_constant(d.lam, g["sec2_phi"], d_coef)
            hold[d.name] = np.where(
                overdense, np.minimum(physics.overdense_duration(q, d.lam, g["sec2_phi"], d_coef), OVERDENSE_HOLD_MAX_S), 0.0
            )
            margin = np.log(np.maximum(peak[d.name] / d.ebn0_threshold, 1.0))
            open_s[d.name] = np.where(peak[d.name] > d.ebn0_threshold, hold[d.name] + tau[d.name] * margin, 0.0)
            cos_phi = np.sqrt(1.0 - g["sin2_phi"])
            doppler[d.name] = physics.doppler_hz(wind, cos_phi, d.lam)  # the stations' oscillators are the air's
        shower_code = np.array([0] + [2 + i for i in showers_on])[source]
        kind = np.where(source > 0, shower_code, overdense.astype(int)).astype(np.int16)
        return Trails(
            t=t,
            kind=kind,
            height_km=height,
            q=q,
            overdense=overdense,
            peak_ebn0=peak,
            tau=tau,
            hold=hold,
            open_s=open_s,
            doppler_hz=doppler,
            fade_depth=np.where(overdense, rng.uniform(0.0, 0.8, n), 0.0),
            fade_hz=rng.uniform(0.5, 5.0, n),
            fade_phase=rng.uniform(0.0, 2 * math.pi, n),
        )

    # --- summaries ---------------------------------------------------------------------

    def kind_name(self, code: int) -> str:
        if code >= 2:
            return sky.SHOWERS[code - 2].name
        return "overdense" if code == OVERDENSE else "underdense"

    def capacity_bits(self, direction: str = "up") -> float:
        """Bits a genie knowing every opening could move at the scenario rate, no
        overhead: the open-time bound (the union of the openings' threshold-open
        time, times the bit rate), summed window by window."""
        total, reach = 0.0, -math.inf  # reach: the latest end of an opening so far
        for _, trails in self.windows():
            if not len(trails):
                continue
            start, length = trails.t, trails.open_s[direction]
            end = start + length
            earlier = np.maximum.accumulate(np.concatenate([[reach], end[:-1]]))
            total += float(np.sum(np.maximum(0.0, end - np.maximum(start, earlier))))
            reach = max(reach, float(end.max()))
        return total * self.scenario.bit_rate


CLEAR_BER = 1e-13  # below this per bit, a frame of at most 2,200 bits fails with p < 3e-10


@functools.cache
def _sample_count(duration: float) -> int:
    """Points at which the frame-success model samples a frame of ``duration`` s:
    one per 5 ms, at least 2 and at most 16, each in the middle of its share
    (remembered: a link sends a few hundred distinct frame lengths at most)."""
    return int(min(16, max(2, math.ceil(duration / 0.005))))


def _ebn0_for_ber(ber_of: Callable[[float], float], ber: float) -> float:
    """Linear Eb/N0 at which a bit-error-rate function falls to ``ber`` (bisection)."""
    low, high = 0.0, 1000.0
    for _ in range(100):
        mid = (low + high) / 2
        if ber_of(mid) > ber:
            low = mid
        else:
            high = mid
    return high


_Trail = tuple[float, float, float, float, float, float, float, float]
"""One trail in one direction: start, hold, tau, peak Eb/N0, fade depth, fade Hz, fade phase, Doppler Hz."""


class _Columns:
    """A trail set as Python tuples, one per trail and direction, for scalar lookups."""

    def __init__(self, tr: Trails) -> None:
        self.t: list[float] = tr.t.tolist()
        common = (tr.fade_depth.tolist(), tr.fade_hz.tolist(), tr.fade_phase.tolist())
        self.rows: dict[str, list[_Trail]] = {
            d: list(zip(self.t, tr.hold[d].tolist(), tr.tau[d].tolist(), tr.peak_ebn0[d].tolist(), *common, tr.doppler_hz[d].tolist(), strict=True))
            for d in DIRECTIONS
        }
        self.live_end: dict[str, list[float]] = {
            d: (tr.t + tr.hold[d] + FADED_TAUS * tr.tau[d]).tolist() for d in DIRECTIONS
        }  # when each trail stops mattering (see Channel._live)


def _envelope_at(row: _Trail, t: float) -> float:
    """Linear Eb/N0 of one trail at t: the scalar twin of ``Channel._envelope``."""
    start, hold, tau, peak, f, fade_hz, phase, _ = row
    age = t - start
    if age < 0:
        return 0.0
    if age < hold:
        return peak * (1 + 2 * f * math.cos(2 * math.pi * fade_hz * age + phase) + f * f) / (1 + f * f)
    return peak * math.exp(-(age - hold) / tau)


@dataclasses.dataclass(frozen=True)
class Opening:
    """A hand-made trail, for tests and worked examples: it starts at ``t`` (s),
    holds its peak ``hold`` seconds (no fading), then decays with ``tau``."""

    t: float
    peak_db: float
    tau: float
    hold: float = 0.0
    peak_db_down: float | None = None  # default: the same as the uplink


def with_openings(trail_set: TrailSet, openings: list[Opening]) -> TrailSet:
    """A copy of ``trail_set`` (its scenario and geometry) whose trails are exactly ``openings``."""
    ordered = sorted(openings, key=lambda o: o.t)
    n = len(ordered)
    out = copy.copy(trail_set)
    peak = {
        "up": np.array([10 ** (o.peak_db / 10) for o in ordered]),
        "down": np.array([10 ** ((o.peak_db if o.peak_db_down is None else o.peak_db_down) / 10) for o in ordered]),
    }
    tau = np.array([o.tau for o in ordered])
    hold = np.array([o.hold for o in ordered])
    open_s = {}
    for d in DIRECTIONS:
        margin = np.log(np.maximum(peak[d] / trail_set.directions[d].ebn0_threshold, 1.0))
        open_s[d] = np.where(peak[d] > trail_set.directions[d].ebn0_threshold, hold + tau * margin, 0.0)
    zeros = np.zeros(n)
    out.trails = Trails(
        t=np.array([o.t for o in ordered]),
        kind=np.where(hold > 0, OVERDENSE, 0).astype(np.int16),
        height_km=np.full(n, 95.0),
        q=zeros,
        overdense=hold > 0,
        peak_ebn0=peak,
        tau={d: tau for d in DIRECTIONS},
        hold={d: hold for d in DIRECTIONS},
        open_s=open_s,
        doppler_hz={d: zeros for d in DIRECTIONS},
        fade_depth=zeros,
        fade_hz=np.ones(n),
        fade_phase=zeros,
    )
    return out


@dataclasses.dataclass(frozen=True)
class FrameOutlook:
    """What the channel holds for one frame: the trail carrying it and the Eb/N0
    reported for it (None: no trail), its success probability, and whether the
    path was above threshold at its first bit (a receiver then synchronises)."""

    carrier: tuple[int, float] | None
    p_success: float
    synchronised: bool


def _strongest_of(live: list[tuple[int, _Trail]], t: float) -> tuple[int, float] | None:
    best: tuple[int, float] | None = None
    for i, row in live:
        value = _envelope_at(row, t)
        if value > 0 and (best is None or value > best[1]):
            best = (i, value)
    return best


def _contenders(live: list[_Trail], t0: float, t1: float) -> list[_Trail]:
    """The trails that can be the strongest somewhere in [t0, t1]: a trail whose
    highest Eb/N0 over the span is below another's lowest never is, and leaving
    it out changes no maximum (so no success probability)."""
    spans = []
    floor = 0.0
    for row in live:
        start, hold, tau, peak, f = row[0], row[1], row[2], row[3], row[4]
        age0, age1 = t0 - start, t1 - start
        ripple_top = peak * (1 + f) ** 2 / (1 + f * f)
        if age0 < 0:  # forms within the span
            high, low = max(ripple_top, peak) if hold > 0 else peak, 0.0
        else:
            low = peak * math.exp(-max(age1 - hold, 0.0) / tau)
            if age0 < hold:
                high = ripple_top
                low = min(low, peak * (1 - f) ** 2 / (1 + f * f))
            else:
                high = peak * math.exp(-(age0 - hold) / tau)
        spans.append(high)
        floor = max(floor, low)
    return [row for row, high in zip(live, spans, strict=True) if high >= floor]


def last_live(trails: Trails) -> float:
    """When the last trail of a set fades past mattering (-inf for an empty set)."""
    if not len(trails):
        return -math.inf
    return float(max(np.max(trails.t + trails.hold[d] + FADED_TAUS * trails.tau[d]) for d in DIRECTIONS))


def audible_periods(trails: Trails, direction: str, floor: float) -> tuple[list[float], list[float]]:
    """Merged (starts, ends) of the periods in which some trail of ``trails`` is above ``floor`` (linear Eb/N0)."""
    if not len(trails):
        return [], []
    peak = trails.peak_ebn0[direction]
    life = trails.hold[direction] + trails.tau[direction] * np.log(np.maximum(peak / floor, 1.0))
    keep = peak > floor
    starts: list[float] = []
    ends: list[float] = []
    for t, length in zip(trails.t[keep].tolist(), life[keep].tolist(), strict=True):
        if starts and t <= ends[-1]:
            ends[-1] = max(ends[-1], t + length)
        else:
            starts.append(t)
            ends.append(t + length)
    return starts, ends


RETAIN_S = 600.0
"""A streaming channel drops a window once its last trail has been faded this
long before the latest time asked about; questions may look back this far."""


class Channel:
    """Questions a link simulation asks of a trail set.

    The trails are held window by window: a question about time t loads the
    windows up to t, and windows whose every trail faded more than
    :data:`RETAIN_S` before t are dropped, so memory is that of a day or two
    however long the run.  Trail indices handed out (``strongest``,
    ``frame_carrier``, ``doppler_of``) are positions in the whole period's
    trail list, stable as windows come and go.  The vectorised methods and
    :attr:`trails` work on the loaded trails (all of them, for a period of one window).
    """

    def __init__(self, trails: TrailSet) -> None:
        self.set = trails
        self.params = trails.directions
        self.modulation = trails.scenario.modulation
        self._ber = physics.ber_function(self.modulation)
        self._clear_ebn0 = _ebn0_for_ber(self._ber, CLEAR_BER)
        self._nil_ebn0 = _ebn0_for_ber(self._ber, 1e-30)
        self._loaded: list[tuple[int, Trails]] = []  # (window, its trails), in order
        self._next_window = 0
        self._base = 0  # whole-period index of the first loaded trail
        self._hi = -math.inf  # trails starting before this are loaded (the next window's start)
        self._audible: dict[tuple[str, float], tuple[list[float], list[float]]] = {}
        self.trails: Trails | None = None
        self._columns: _Columns | None = None
        self._reach = {d: 0.0 for d in DIRECTIONS}
        self._load_next(-math.inf)

    # --- the loaded windows ----------------------------------------------------------

    @property
    def exhausted(self) -> bool:
        """Every window of the period has been loaded."""
        return self._next_window >= self.set.window_count

    def _ensure(self, t: float) -> None:
        """Load windows until every trail that starts by t is loaded."""
        while t >= self._hi and not self.exhausted:
            self._load_next(t)

    def _load_next(self, now: float) -> None:
        w = self._next_window
        self._next_window += 1
        self._loaded.append((w, self.set.window(w)))
        self._hi = math.inf if self.exhausted else self.set.window_bounds(self._next_window)[0]
        while len(self._loaded) > 1 and last_live(self._loaded[0][1]) < now - RETAIN_S:
            self._base += len(self._loaded.pop(0)[1])
        parts = [trails for _, trails in self._loaded]
        data = parts[0] if len(parts) == 1 else Trails.concatenate(parts)
        self.trails = data
        self._columns = _Columns(data) if len(data) else None
        # How far back a trail can start and still matter: its threshold-open
        # time, or its plateau and FADED_TAUS decay constants, whichever is longer.
        self._reach = {
            d: float(np.max(np.maximum(data.open_s[d], data.hold[d] + FADED_TAUS * data.tau[d]))) if len(data) else 0.0
            for d in DIRECTIONS
        }
        self._audible.clear()

    def _local(self, index: int) -> int:
        local = index - self._base
        if not 0 <= local < len(self.trails or ()):
            raise IndexError(f"trail {index} is not loaded (loaded: {self._base} to {self._base + len(self.trails or ()) - 1})")
        return local

    # --- one frame at a time (the link simulation's questions) ---------------------
    #
    # Plain-Python twins of the numpy methods below, for one query at a time,
    # where numpy's per-call overhead would dominate; tests/test_channel_model.py
    # checks that both give the same numbers.

    def _live(self, direction: str, t0: float, t1: float) -> list[tuple[int, _Trail]]:
        """Trails that can matter to a frame on [t0, t1]: started by t1, and not
        more than FADED_TAUS decay constants past their plateau at t0 (below
        e^-40 of the peak, which moves a frame's success probability by less
        than 1e-9; tests check it).  Indices are whole-period ones."""
        if t1 >= self._hi:
            self._ensure(t1)
        c = self._columns
        if c is None:
            return []
        rows, live_end = c.rows[direction], c.live_end[direction]
        lo = bisect.bisect_left(c.t, t1 - self._reach[direction])
        hi = bisect.bisect_right(c.t, t1)
        base = self._base
        return [(base + i, rows[i]) for i in range(lo, hi) if live_end[i] > t0]

    def strongest(self, direction: str, t: float) -> tuple[int, float] | None:
        """(index, linear Eb/N0) of the strongest trail at t, or None when none is up."""
        return _strongest_of(self._live(direction, t, t), t)

    def frame_carrier(self, direction: str, t0: float, bits: int) -> tuple[int, float] | None:
        """(index, linear Eb/N0) of the trail that carries a frame of ``bits`` sent
        at t0, and the Eb/N0 the receiver reports for it.  Normally the
        strongest trail at the first bit, measured there.  The success model
        first samples a frame in the middle of its first share, so it takes a
        trail that forms between the first bit and that point as carrying the
        whole frame; such a trail, measured as it forms, is the carrier when it
        is the stronger (otherwise the frame would be reported at the Eb/N0 of
        whatever faded trail its first bit met).  None when neither exists."""
        duration = bits / self.params[direction].bit_rate
        return self._carrier(self._live(direction, t0, t0 + duration), t0, duration)[0]

    @staticmethod
    def _carrier(live: list[tuple[int, _Trail]], t0: float, duration: float) -> tuple[tuple[int, float] | None, tuple[int, float] | None]:
        """(the carrier of :meth:`frame_carrier`, the strongest trail at t0)."""
        at_start = _strongest_of(live, t0)
        best = at_start
        first_look = t0 + 0.5 * duration / _sample_count(duration)
        for i, row in live:
            if t0 < row[0] <= first_look:
                value = _envelope_at(row, row[0])
                if value > 0 and (best is None or value > best[1]):
                    best = (i, value)
        return best, at_start

    def outlook(self, direction: str, t0: float, bits: int, live: list[tuple[int, _Trail]] | None = None) -> FrameOutlook:
        """Everything the air asks about one frame, from one lookup of the live
        trails: its carrier (:meth:`frame_carrier`), its success probability
        (:meth:`success_probability`) and whether the path was open at its first bit."""
        duration = bits / self.params[direction].bit_rate
        if live is None:
            live = self._live(direction, t0, t0 + duration)
        best, at_start = self._carrier(live, t0, duration)
        threshold = self.params[direction].ebn0_threshold
        p = self._success([row for _, row in live], t0, bits, duration)
        return FrameOutlook(best, p, at_start is not None and at_start[1] >= threshold)

    def audible_windows(self, direction: str, bits: int, p_min: float = 1e-6) -> tuple[list[float], list[float]]:
        """Merged (starts, ends) over the whole period (:attr:`TrailSet.trails`)
        of the periods in which a frame of ``bits`` could arrive with
        probability above ``p_min``: from each trail's start until its
        envelope falls below the Eb/N0 at which even such a frame fails.
        Short frames outlast the BER threshold that defines "open" by a few tau.
        Trails never above the threshold in either direction are not in the set."""
        return audible_periods(self.set.trails, direction, self.audible_floor(bits, p_min))

    def audible_floor(self, bits: int, p_min: float = 1e-6) -> float:
        """Eb/N0 below which a frame of ``bits`` arrives with probability below ``p_min``."""
        ber = 1 - p_min ** (1 / bits)  # per-bit error rate at which the frame's success is p_min
        return _ebn0_for_ber(self._ber, ber)

    def next_audible(self, direction: str, bits: int, t: float, p_min: float = 1e-6) -> tuple[float, float] | None:
        """The first (start, end) of :meth:`audible_windows` that ends after t,
        found in the loaded windows (loading more as needed); None when the
        period holds no more.  The answer is final: its end lies before the
        first trail not yet loaded, or every window is loaded."""
        self._ensure(t)
        while True:
            key = (direction, float(bits))
            if key not in self._audible:
                trails = self.trails
                assert trails is not None
                self._audible[key] = audible_periods(trails, direction, self.audible_floor(bits, p_min))
            starts, ends = self._audible[key]
            w = bisect.bisect_right(ends, t)
            if w < len(starts) and ends[w] < self._hi:
                return starts[w], ends[w]
            if self.exhausted:
                return (starts[w], ends[w]) if w < len(starts) else None
            self._load_next(t)

    def doppler_of(self, direction: str, index: int) -> float:
        """Doppler offset (Hz) of trail ``index`` as seen in ``direction``."""
        assert self._columns is not None
        return self._columns.rows[direction][self._local(index)][7]

    def success_probability(self, direction: str, t0: float, bits: int) -> float:
        """:meth:`frame_success_probability`, computed in plain Python."""
        duration = bits / self.params[direction].bit_rate
        return self._success([row for _, row in self._live(direction, t0, t0 + duration)], t0, bits, duration)

    def _success(self, live: list[_Trail], t0: float, bits: int, duration: float) -> float:
        if not live:
            return 0.0
        t1 = t0 + duration
        if self._surely_clear(live, t0, t1):
            return 1.0
        if len(live) > 1:
            live = _contenders(live, t0, t1)
        samples = _sample_count(duration)
        step = duration / samples
        ber, log1p = self._ber, math.log1p
        log_ok = 0.0
        if len(live) == 1 and t0 + 0.5 * step - live[0][0] >= live[0][1]:
            # One trail, decaying over the whole frame: each sample is the last
            # times a constant factor (the same numbers, one multiply instead of an exp).
            x = _envelope_at(live[0], t0 + 0.5 * step)
            factor = math.exp(-step / live[0][2])
            for _ in range(samples):
                log_ok += log1p(-min(ber(x), 0.5))
                x *= factor
        elif len(live) == 1:
            row = live[0]
            for k in range(samples):
                log_ok += log1p(-min(ber(_envelope_at(row, t0 + (k + 0.5) * step)), 0.5))
        else:
            for k in range(samples):
                t = t0 + (k + 0.5) * step
                log_ok += log1p(-min(ber(max(_envelope_at(row, t) for row in live)), 0.5))
        return math.exp(log_ok * bits / samples)

    def _surely_clear(self, live: list[_Trail], t0: float, t1: float) -> bool:
        """True when some trail stays so strong over [t0, t1] that every bit's
        error rate is below CLEAR_BER: the frame then succeeds with probability
        above 1 - bits x 1e-13, and 1.0 is returned without sampling.  The
        bound per trail: the decay is monotonic, and the plateau's two-ray
        ripple never falls below (1 - f)^2 / (1 + f^2) of the peak."""
        floor = self._clear_ebn0
        for start, hold, tau, peak, f, _, _, _ in live:
            age0, age1 = t0 - start, t1 - start
            if age0 < 0:
                continue
            lowest = peak * math.exp(-max(age1 - hold, 0.0) / tau)
            if age0 < hold:
                lowest = min(lowest, peak * (1 - f) ** 2 / (1 + f * f))
            if lowest > floor:
                return True
        return False

    # --- vectorised (reports, plots, the reference for the scalar twins) -----------

    def _envelope(self, direction: str, index: NDArray[np.int64], t: Array) -> Array:
        tr = self.trails
        assert tr is not None
        age = t - tr.t[index]
        hold = tr.hold[direction][index]
        tau = tr.tau[direction][index]
        decay = np.exp(-np.maximum(age - hold, 0.0) / tau)
        fade = tr.fade_depth[index]
        ripple = np.abs(1 + fade * np.exp(1j * (2 * math.pi * tr.fade_hz[index] * age + tr.fade_phase[index]))) ** 2 / (1 + fade**2)
        envelope = np.where(age < hold, ripple, decay)
        return np.where(age >= 0, tr.peak_ebn0[direction][index] * envelope, 0.0)

    def _candidates(self, direction: str, t: float) -> NDArray[np.int64]:
        tr = self.trails
        if tr is None or not len(tr):
            return np.zeros(0, dtype=np.int64)
        lo = int(np.searchsorted(tr.t, t - self._reach[direction], side="left"))
        hi = int(np.searchsorted(tr.t, t, side="right"))
        return np.arange(lo, hi, dtype=np.int64)

    def ebn0(self, direction: str, t: float) -> float:
        """Eb/N0 (linear) of the strongest trail at time t (0 when none)."""
        idx = self._candidates(direction, t)
        if not len(idx):
            return 0.0
        return float(np.max(self._envelope(direction, idx, np.full(len(idx), t))))

    def snr_db(self, direction: str, t: float) -> float:
        value = self.ebn0(direction, t)
        return 10 * math.log10(value) if value > 0 else -math.inf

    def open_until(self, direction: str, t: float) -> float | None:
        """End of the opening that holds the path above threshold at t, or None."""
        tr = self.trails
        idx = self._candidates(direction, t)
        if tr is None or not len(idx):
            return None
        ends = tr.t[idx] + tr.open_s[direction][idx]
        live = (ends > t) & (tr.open_s[direction][idx] > 0)
        return float(np.max(ends[live])) if np.any(live) else None

    def doppler_hz(self, direction: str, t: float) -> float | None:
        tr = self.trails
        idx = self._candidates(direction, t)
        if tr is None or not len(idx):
            return None
        strongest = idx[int(np.argmax(self._envelope(direction, idx, np.full(len(idx), t))))]
        return float(tr.doppler_hz[direction][strongest])

    def frame_success_probability(self, direction: str, t0: float, bits: int) -> float:
        """Probability that every bit of a frame sent at t0 is right, integrating the
        bit-error rate over the SNR trajectory across the frame."""
        duration = bits / self.params[direction].bit_rate
        idx = self._candidates(direction, t0 + duration)
        if not len(idx):
            return 0.0
        samples = _sample_count(duration)
        times = t0 + (np.arange(samples) + 0.5) * duration / samples
        grid_t = np.repeat(times, len(idx))
        grid_i = np.tile(idx, samples)
        ebn0 = self._envelope(direction, grid_i, grid_t).reshape(samples, len(idx)).max(axis=1)
        ber = physics.bit_error_rate(self.modulation, ebn0)
        log_ok = np.sum(np.log1p(-np.minimum(ber, 0.5))) * bits / samples
        return float(math.exp(log_ok))

    def success_probabilities(self, direction: str, t0: Array, bits: int) -> Array:
        """:meth:`success_probability` of frames of ``bits`` sent at each of ``t0``
        (sorted, spanning less than :data:`RETAIN_S`), in one numpy pass: the
        lazy probe stream's reckoning of the probes it did not simulate one by
        one.  Each frame sees exactly the trails :meth:`_live` would give it
        (the work is the live (frame, trail) pairs), the same model and the same shortcuts (1.0 when some
        trail is surely clear, 0.0 when none is live); the numbers agree with
        the scalar path to rounding (tests/test_scale.py)."""
        out = np.zeros(len(t0))
        if not len(t0):
            return out
        duration = bits / self.params[direction].bit_rate
        self._ensure(float(t0[-1]) + duration)
        tr = self.trails
        if tr is None or not len(tr):
            return out
        t1 = t0 + duration
        # The (frame, trail) pairs _live would give: each candidate trail is live for a
        # contiguous run of the (sorted) frames, those with t0 < its fade-out and t1 >= its start.
        first = int(np.searchsorted(tr.t, float(t1[0]) - self._reach[direction], side="left"))
        last = int(np.searchsorted(tr.t, float(t1[-1]), side="right"))
        cand = np.arange(first, last, dtype=np.int64)
        start_c = tr.t[cand]
        live_end = start_c + tr.hold[direction][cand] + FADED_TAUS * tr.tau[direction][cand]
        a = np.searchsorted(t1, start_c, side="left")
        b = np.searchsorted(t0, live_end, side="left")
        runs = b > a
        cand, a, b = cand[runs], a[runs], b[runs]
        if not len(cand):
            return out
        lengths = b - a
        total = int(lengths.sum())
        offsets = np.repeat(np.cumsum(lengths) - lengths, lengths)
        frame = np.repeat(a, lengths) + (np.arange(total) - offsets)  # each pair's frame
        trail = np.repeat(cand, lengths)  # and trail
        start = tr.t[trail]
        hold, tau, peak = tr.hold[direction][trail], tr.tau[direction][trail], tr.peak_ebn0[direction][trail]
        f = tr.fade_depth[trail]
        samples = _sample_count(duration)
        age = (t0[frame] - start)[:, None] + (np.arange(samples) + 0.5) * (duration / samples)  # (pairs, samples)
        env = np.exp(-np.maximum(age - hold[:, None], 0.0) / tau[:, None])
        if np.any(hold > 0):
            fd = f[:, None]
            ripple = (1 + 2 * fd * np.cos(2 * math.pi * tr.fade_hz[trail][:, None] * age + tr.fade_phase[trail][:, None]) + fd * fd) / (1 + fd * fd)
            env = np.where(age < hold[:, None], ripple, env)
        env = np.where(age >= 0, peak[:, None] * env, 0.0)
        strongest = np.zeros((len(t0), samples))
        np.maximum.at(strongest, frame, env)
        # Only samples weak enough to err count: above _nil_ebn0 a bit's error rate is below
        # 1e-30, and log1p(-ber) rounds to zero in any sum it could join.
        log_ok = np.zeros(strongest.shape)
        weak = strongest < self._nil_ebn0
        if np.any(weak):
            log_ok[weak] = np.log1p(-np.minimum(physics.bit_error_rate(self.modulation, strongest[weak]), 0.5))
        p = np.exp(np.sum(log_ok, axis=1) * bits / samples)
        # The scalar path's shortcut: some started trail stays above the clear floor over the frame.
        age0 = t0[frame] - start
        lowest = peak * np.exp(-np.maximum(age0 + duration - hold, 0.0) / tau)
        ripple_floor = peak * (1 - f) ** 2 / (1 + f**2)
        lowest = np.where(age0 < hold, np.minimum(lowest, ripple_floor), lowest)
        clear = np.bincount(frame[(age0 >= 0) & (lowest > self._clear_ebn0)], minlength=len(t0)) > 0
        live = np.bincount(frame, minlength=len(t0)) > 0
        return np.where(clear, 1.0, np.where(live, p, 0.0))

    def frame_ok(self, direction: str, t0: float, bits: int, rng: np.random.Generator) -> bool:
        """Did a frame of ``bits`` sent at t0 get through?  Drawn from ``rng``."""
        return bool(rng.random() < self.frame_success_probability(direction, t0, bits))
