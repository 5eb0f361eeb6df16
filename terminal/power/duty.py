"""A transmit duty-cycle limit over a sliding window (a regulatory or thermal limit).

The limit says: in *any* window of ``window_s`` seconds, the transmitter is
keyed for at most ``fraction * window_s``.  Past transmissions satisfy it;
a new one from ``t`` to ``t + a`` adds airtime only to windows that overlap
it, and of those the one ending at ``t + a`` holds the most: shifting a
window earlier by d loses d of the new frame and gains at most d of the
past.  So :meth:`DutyCycle.allows` checks that one window, and the limit
then holds in every window, exactly.

Memory is bounded: keyed intervals older than the window are dropped,
back-to-back ones are merged, and past ``max_intervals`` the two oldest are
merged into one spanning both, which can only overstate the airtime (so the
limit still holds, conservatively).
"""

from __future__ import annotations

import collections

from ionotrail.terminal.errors import UsageError
from ionotrail.terminal.limits import DUTY_INTERVALS_MAX


class DutyCycle:
    def __init__(self, fraction: float, window_s: float, *, max_intervals: int = DUTY_INTERVALS_MAX) -> None:
        if not 0 < fraction <= 1:
            raise UsageError(f"duty-cycle fraction {fraction!r} must be above 0 and at most 1")
        if not 0 < window_s <= 86400:
            raise UsageError(f"duty-cycle window {window_s!r} s must be above 0 and at most a day")
        if not max_intervals >= 2:
            raise UsageError(f"a duty-cycle ledger keeps at least 2 intervals, not {max_intervals!r}")
        self.fraction, self.window_s, self.max_intervals = float(fraction), float(window_s), max_intervals
        self.budget_s = self.fraction * self.window_s
        self._keyed: collections.deque[list[float]] = collections.deque()  # [start, end], in time order
        self.refusals = 0

    def used(self, start: float, end: float) -> float:
        """Keyed seconds recorded within [start, end]."""
        return sum(max(0.0, min(e, end) - max(s, start)) for s, e in self._keyed)

    def allows(self, now: float, airtime: float) -> bool:
        """May a transmission of ``airtime`` seconds start at ``now``?  (A refusal is
        counted.)  Asking forgets nothing: a shorter frame asked for next, at the same
        moment, still sees every keyed interval its window holds."""
        ok = airtime + self.used(now + airtime - self.window_s, now + airtime) <= self.budget_s + 1e-12
        if not ok:
            self.refusals += 1
        return ok

    def record(self, start: float, end: float) -> None:
        """The transmitter was keyed from ``start`` to ``end`` (not before the last record's start)."""
        if not end >= start:
            raise UsageError(f"a keyed interval ends ({end!r}) before it starts ({start!r})")
        keyed = self._keyed
        if keyed and start < keyed[-1][0]:
            raise UsageError(f"keyed intervals come in time order; {start!r} is before {keyed[-1][0]!r}")
        if keyed and start <= keyed[-1][1]:
            keyed[-1][1] = max(keyed[-1][1], end)
        else:
            keyed.append([start, end])
        self._forget(start - self.window_s)  # no later question can reach back before the window of ``start``
        while len(keyed) > self.max_intervals:
            first = keyed.popleft()
            keyed[0][0] = first[0]  # one interval spanning both: overstates, never understates

    def _forget(self, before: float) -> None:
        keyed = self._keyed
        while keyed and keyed[0][1] <= before:
            keyed.popleft()
