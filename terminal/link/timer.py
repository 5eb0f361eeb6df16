"""The one timer a link endpoint holds: what it is for, and when it is due.

An endpoint never keeps loose timestamps whose meaning depends on its state.
It holds a single :class:`Timer` (or None, when only arriving frames can make
it act) and every decision of its table sets it afresh.  The shell calls the
endpoint's ``on_timer(now)`` at or after ``timer.at``; early calls are harmless.
After ``on_timer(now)`` the timer is None or due later than ``now``, so a
shell can never spin at one instant.
"""

from __future__ import annotations

import enum
from typing import NamedTuple


class Purpose(enum.Enum):
    """What a timer is for."""

    TURNAROUND = "turnaround"
    """The terminal's radio has switched to transmit: send, or go quiet."""
    AIR_END = "air end"
    """The terminal's frame has left the antenna: send the next, or wait."""
    SILENCE = "silence"
    """No probe since ``burst_silence``: the terminal's burst is over."""
    MASTER = "master"
    """The master's next duty: expire a half-built message, or put the next
    acknowledgement news on its probe."""


class Timer(NamedTuple):
    purpose: Purpose
    at: float
    """When it is due, on the endpoint's clock."""


def due_at(timer: Timer | None) -> float | None:
    """The deadline of a timer (None when no timer runs)."""
    return None if timer is None else timer.at
