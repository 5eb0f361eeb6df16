"""The modem's clock on the host's clock: offset and drift from timestamp pairs.

A modem stamps what it reports with its own clock (microseconds since it
started); the host reads each record a little later, after a serial delay
that is never negative and varies (buffers, USB polling, scheduling).  The
difference ``host - modem`` of every reading therefore lies on or above the
line ``drift * modem + offset``, and the readings with the least delay sit on
its lower envelope.  :class:`ModemClock` keeps the lower convex hull of recent
readings and takes the hull edge over the middle of their span as the line:
the line below every reading with the least total gap to them (Moon, Skelly
and Towsley, "Estimation and removal of clock skew from network delay
measurements", IEEE INFOCOM 1999; from memory of the paper's result that the
optimum is the hull edge spanning the mean reading time).  Its state is at
most ``window`` readings.
"""

from __future__ import annotations

import itertools
import math

from ionotrail.terminal.errors import UsageError
from ionotrail.terminal.limits import (
    MAX_MODEM_DRIFT,
    MODEM_CLOCK_HORIZON_S,
    MODEM_CLOCK_MIN_SPAN_S,
    MODEM_CLOCK_WINDOW,
)


class ModemClock:
    """Estimates ``host = modem * (1 + drift) + offset`` from readings; bounded state."""

    def __init__(self, window: int = MODEM_CLOCK_WINDOW) -> None:
        if not isinstance(window, int) or isinstance(window, bool) or not 2 <= window <= 1 << 16:
            raise UsageError(f"window={window!r} must be an integer from 2 to 65536")
        self.window = window
        self.last_host_s = math.nan
        """Host time of the latest reading (NaN before the first)."""
        self._reference = 0.0  # modem time the hull's abscissae are counted from
        self._hull: list[tuple[float, float]] = []  # (modem - reference, host - modem), ascending modem time
        self._drift = 0.0
        self._intercept = 0.0  # host - modem at the reference

    def __len__(self) -> int:
        """Readings kept (at most ``window``)."""
        return len(self._hull)

    @property
    def drift(self) -> float:
        """Estimated rate error of the modem's clock (5e-5 is 50 ppm fast host, slow modem)."""
        return self._drift

    @property
    def offset(self) -> float:
        """Estimated host time at modem time zero: ``host - modem * (1 + drift)``."""
        return self._intercept - self._drift * self._reference

    def reset(self) -> None:
        """Forget the readings: the modem restarted and its clock with it."""
        self._hull.clear()
        self._drift = 0.0
        self._intercept = 0.0
        self._reference = 0.0

    def observe(self, modem_time_s: float, host_time_s: float) -> None:
        """A record stamped ``modem_time_s`` was read at ``host_time_s``.

        A NaN modem time (a dialect without one) only updates the latest host
        time.  A modem time earlier than the last means the modem restarted
        unannounced: the readings start over."""
        if not _finite(host_time_s):
            raise UsageError(f"host_time_s={host_time_s!r} must be a finite number of seconds")
        self.last_host_s = float(host_time_s)
        if isinstance(modem_time_s, float) and math.isnan(modem_time_s):
            return
        if not _finite(modem_time_s):
            raise UsageError(f"modem_time_s={modem_time_s!r} must be a finite number of seconds or NaN")
        if not self._hull:
            self._reference = float(modem_time_s)
        x, y = modem_time_s - self._reference, host_time_s - modem_time_s
        hull = self._hull
        if hull and x < hull[-1][0]:
            self.reset()
            self.observe(modem_time_s, host_time_s)
            return
        if hull and x == hull[-1][0]:
            if y >= hull[-1][1]:
                return
            hull.pop()
        while len(hull) >= 2 and _turn(hull[-2], hull[-1], (x, y)) <= 0:
            hull.pop()  # the last vertex lies on or above the segment to the new reading
        hull.append((x, y))
        while len(hull) > self.window or (len(hull) > 2 and hull[0][0] < x - MODEM_CLOCK_HORIZON_S):
            del hull[0]
        self._estimate()

    def _estimate(self) -> None:
        hull = self._hull
        first, last = hull[0][0], hull[-1][0]
        if len(hull) >= 2 and last - first >= MODEM_CLOCK_MIN_SPAN_S:
            middle = (first + last) / 2
            for (x0, y0), (x1, y1) in itertools.pairwise(hull):
                if x1 >= middle:
                    break
            self._drift = min(MAX_MODEM_DRIFT, max(-MAX_MODEM_DRIFT, (y1 - y0) / (x1 - x0)))
        self._intercept = min(y - self._drift * x for x, y in hull)

    def to_host(self, modem_time_s: float) -> float:
        """The host time of a modem time; a NaN modem time gives the latest host time observed."""
        if isinstance(modem_time_s, float) and math.isnan(modem_time_s):
            if math.isnan(self.last_host_s):
                raise UsageError("no reading observed yet: observe a record before asking for its time")
            return self.last_host_s
        if not _finite(modem_time_s):
            raise UsageError(f"modem_time_s={modem_time_s!r} must be a finite number of seconds or NaN")
        if not self._hull:
            raise UsageError("no modem time observed yet: observe a record before converting its time")
        return float(modem_time_s + self._intercept + self._drift * (modem_time_s - self._reference))


def _finite(value: object) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


def _turn(a: tuple[float, float], b: tuple[float, float], c: tuple[float, float]) -> float:
    """Positive when a, b, c turn counter-clockwise (b below the segment from a to c)."""
    return (b[0] - a[0]) * (c[1] - a[1]) - (b[1] - a[1]) * (c[0] - a[0])
