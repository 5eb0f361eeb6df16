"""A seeded misbehaving channel for property tests of the protocol core.

Not the meteor-burst physics (that is the channel model): this channel only
does what radio links do wrong to frames in flight, at rates set by a
:class:`FaultSchedule` — independent loss, bursty loss (the two-state
Gilbert-Elliott model), duplication, reordering, corruption (bit flips the
CRC must catch) and truncation.
"""

from __future__ import annotations

import dataclasses
import random


@dataclasses.dataclass(frozen=True, slots=True)
class FaultSchedule:
    """Probabilities per frame, and the byte budgets of successive openings."""

    loss: float = 0.0
    burst_enter: float = 0.0
    """Gilbert-Elliott: probability per frame of moving from the good to the bad state."""
    burst_leave: float = 1.0
    """Gilbert-Elliott: probability per frame of moving from bad back to good."""
    burst_loss: float = 1.0
    """Loss probability while in the bad state."""
    duplicate: float = 0.0
    reorder: float = 0.0
    corrupt: float = 0.0
    truncate: float = 0.0
    budgets: tuple[int, ...] = (200,)


FAIR = FaultSchedule()
"""Delivers every frame once, in order."""


class FaultyChannel:
    """Applies a schedule to the frames of one direction."""

    def __init__(self, schedule: FaultSchedule, rng: random.Random) -> None:
        self.schedule = schedule
        self.rng = rng
        self.bad = False
        self.counts = {"sent": 0, "lost": 0, "duplicated": 0, "reordered": 0, "corrupted": 0, "truncated": 0}

    def carry(self, frames: list[bytes]) -> list[bytes]:
        """The frames that arrive, in arrival order, possibly damaged."""
        s, rng = self.schedule, self.rng
        out: list[bytes] = []
        for frame in frames:
            self.counts["sent"] += 1
            self.bad = (rng.random() >= s.burst_leave) if self.bad else (rng.random() < s.burst_enter)
            if rng.random() < (s.burst_loss if self.bad else s.loss):
                self.counts["lost"] += 1
                continue
            if rng.random() < s.corrupt:
                damaged = bytearray(frame)
                damaged[rng.randrange(len(damaged))] ^= 1 << rng.randrange(8)
                frame = bytes(damaged)
                self.counts["corrupted"] += 1
            elif rng.random() < s.truncate and len(frame) > 1:
                frame = frame[: rng.randrange(1, len(frame))]
                self.counts["truncated"] += 1
            out.append(frame)
            if rng.random() < s.duplicate:
                out.append(frame)
                self.counts["duplicated"] += 1
        if len(out) > 1 and rng.random() < s.reorder:
            rng.shuffle(out)
            self.counts["reordered"] += 1
        return out
