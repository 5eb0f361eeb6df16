"""The uplink gate: stop spending the transmitter on a path that only opens one way.

The terminal learns that a trail is open from the master's probes, but a
probe proves only the downlink.  When the uplink is the weaker direction
(a smaller transmitter at the terminal, a noisier site at the master), a
trail just strong enough to carry the probe is too weak to carry the reply,
and every frame sent into it is wasted energy.  The sign is plain: frames
go unacknowledged while probes keep arriving.

The gate keeps a floor on the probe Eb/N0 below which the terminal does not
transmit.  A burst that sent frames, heard probes after them (the master
had its chance to acknowledge) and had none confirmed is a *closed-path
burst*: the floor rises to the burst's first probe Eb/N0 plus ``step_db``
(a back-off, counted).  A burst with a confirmed piece lowers the floor by
``relax_db``, and the floor also sinks by ``relax_db_per_hour`` as time
passes, so a gate set too high (by a fault on the downlink, say, that lost
the acknowledgements) reopens by itself: additive increase past a failure,
slow decrease, as congestion control does.  The floor starts open (minus
infinity) and never exceeds ``max_db``.  State: three floats and a counter.
"""

from __future__ import annotations

import dataclasses
import math

from ionotrail.terminal.errors import UsageError


@dataclasses.dataclass(slots=True)
class UplinkGate:
    step_db: float = 1.0
    relax_db: float = 0.5
    relax_db_per_hour: float = 2.0
    max_db: float = 40.0
    level_db: float = -math.inf
    """The floor as last set, at ``since``; it sinks from there."""
    since: float = 0.0
    backoffs: int = 0
    """Closed-path bursts: each raised the floor."""

    def __post_init__(self) -> None:
        if not (self.step_db > 0 and self.relax_db >= 0 and self.relax_db_per_hour >= 0 and math.isfinite(self.max_db)):
            raise UsageError(f"uplink gate needs step_db > 0, relax rates >= 0 and a finite max_db, not {self!r}")

    def floor_db(self, now: float) -> float:
        """The probe Eb/N0 below which the terminal does not transmit at ``now``."""
        return self.level_db - max(0.0, now - self.since) * self.relax_db_per_hour / 3600.0

    def allows(self, snr_db: float, now: float) -> bool:
        """May the terminal transmit at ``now`` on a probe heard at ``snr_db``?  (NaN: unknown, allowed.)"""
        return not snr_db < self.floor_db(now)

    def burst_ended(self, now: float, *, sent: int, confirmed: int, heard_after: int, first_snr_db: float) -> None:
        """A burst's outcome at its end ``now``: frames ``sent``, pieces
        ``confirmed``, probes ``heard_after`` its first frame left the antenna,
        and the Eb/N0 of the probe that started it."""
        if sent and not confirmed and heard_after and not math.isnan(first_snr_db):
            self.backoffs += 1
            self.level_db, self.since = min(self.max_db, max(self.floor_db(now), first_snr_db) + self.step_db), now
        elif confirmed and self.level_db > -math.inf:
            self.level_db, self.since = self.floor_db(now) - self.relax_db, now
