"""The usable-burst rate by hour of the day, learned from what the terminal heard.

Meteor rates follow local solar time (most at dawn, fewest in the early
evening), so a rate is kept per hour: openings heard, over seconds spent
listening, in that hour of the day.  A prior, flat or from a channel
forecast, stands for ``prior_s`` seconds of listening (a gamma prior on a
Poisson rate: the estimate is (prior openings + heard) / (prior seconds +
listened)).  Each bin remembers at most :data:`RATE_MEMORY_S` of listening;
past that its counts are scaled down together, so the estimate follows the
season.  State: 24 pairs of floats.
"""

from __future__ import annotations

from collections.abc import Sequence

from ionotrail.terminal.errors import UsageError
from ionotrail.terminal.limits import RATE_BINS, RATE_MEMORY_S

DEFAULT_PRIOR_PER_HOUR = 30.0
"""Openings an hour assumed before anything is heard: a modest link
(fielded links hear tens to hundreds an hour; common practice, no source)."""


class BurstRates:
    def __init__(self, prior_per_hour: Sequence[float] | float = DEFAULT_PRIOR_PER_HOUR, *, prior_s: float = 1800.0,
                 utc_offset_s: float = 0.0) -> None:  # fmt: skip
        """``prior_per_hour``: one rate for every hour, or 24 (hour 0 first, local
        solar time); ``utc_offset_s``: the site's longitude as a time (lon / 15 h)."""
        rates = [float(prior_per_hour)] * RATE_BINS if isinstance(prior_per_hour, (int, float)) else [float(r) for r in prior_per_hour]
        if len(rates) != RATE_BINS or not all(0 < r < 1e6 for r in rates):
            raise UsageError(f"a burst-rate prior is one or {RATE_BINS} positive rates per hour, not {prior_per_hour!r}")
        if not 0 < prior_s <= RATE_MEMORY_S:
            raise UsageError(f"prior weight {prior_s!r} s must be above 0 and at most {RATE_MEMORY_S:g} s")
        self.utc_offset_s = float(utc_offset_s)
        self._heard = [r * prior_s / 3600.0 for r in rates]
        self._listened = [prior_s] * RATE_BINS

    def hour(self, unix_s: float) -> int:
        """The bin of an instant (local solar hour)."""
        return int(((unix_s + self.utc_offset_s) // 3600.0) % RATE_BINS)

    def per_second(self, hour: int) -> float:
        return self._heard[hour] / self._listened[hour]

    def observe(self, hour: int, listened_s: float, openings: float) -> None:
        """``openings`` heard over ``listened_s`` seconds of listening in ``hour`` (a
        share of a count when a listening interval spans two hours)."""
        if listened_s < 0 or openings < 0:
            raise UsageError(f"cannot observe {openings!r} openings over {listened_s!r} s")
        heard, listened = self._heard[hour] + openings, self._listened[hour] + listened_s
        if listened > RATE_MEMORY_S:
            scale = RATE_MEMORY_S / listened
            heard, listened = heard * scale, RATE_MEMORY_S
        self._heard[hour], self._listened[hour] = heard, listened

    def expected_wait_s(self, hour: int) -> float:
        """Mean seconds of listening to the next opening in ``hour``."""
        return 1.0 / self.per_second(hour)
