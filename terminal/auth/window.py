"""Anti-replay: the receiver's window and the sender's durable counter.

The window is RFC 4303's (s3.4.3 and Appendix A): its right edge is the
highest counter *accepted*, counters more than ``size - 1`` behind it are
too old to judge and refused, and inside it each counter is accepted once.
The bits are kept as RFC 6479 keeps them: a ring indexed by the counter
modulo the size, so moving the edge clears only the slots it enters and
never shifts the rest.  :meth:`ReplayWindow.check` changes nothing;
:meth:`ReplayWindow.accept` moves the window and is called only once a
frame's tag has verified, so a forged frame can never move it.

Counters travel in full (32 bits; AUTH_COUNTER_BITS) and start at 1 in each
key epoch; nothing is rebuilt from low bits.  A sender never wraps: at the
last counter it must rotate to the next epoch.

:class:`SendCounter` is RFC 4303 s5 for senders that reboot: before using
counter R it has durably saved a reservation of at least R, taken
AUTH_COUNTER_RESERVE at a time; after a reboot it continues after the
reservation, so every counter sent after a reboot is larger than every
counter sent before it.
"""

from __future__ import annotations

import enum

from ionotrail.terminal.errors import UsageError
from ionotrail.terminal.limits import (
    AUTH_COUNTER_BITS,
    AUTH_COUNTER_RESERVE,
    AUTH_MAX_REPLAY_WINDOW,
    AUTH_REPLAY_WINDOW,
)

MAX_COUNTER = (1 << AUTH_COUNTER_BITS) - 1


class Verdict(enum.Enum):
    """What the window says of a counter."""

    NEW = "new"
    DUPLICATE = "duplicate"
    STALE = "stale"
    """Older than the window (or 0, which no sender uses): it cannot be told from a replay."""


class ReplayWindow:
    """Accepted counters of one stream: the highest, and a ring of ``size`` bits behind it."""

    __slots__ = ("ring", "size", "top")

    def __init__(self, size: int = AUTH_REPLAY_WINDOW, top: int = 0, ring: int = 0) -> None:
        if not isinstance(size, int) or not 1 <= size <= AUTH_MAX_REPLAY_WINDOW:
            raise UsageError(f"an anti-replay window holds 1 to {AUTH_MAX_REPLAY_WINDOW} entries, not {size!r}")
        if not 0 <= top <= MAX_COUNTER or not 0 <= ring < 1 << size:
            raise UsageError("window edge or bits out of range")
        self.size = size
        self.top = top  # highest counter accepted; 0 before the first
        self.ring = ring  # bit c % size set: counter c accepted (for c within the window)

    def check(self, counter: int) -> Verdict:
        """The verdict on ``counter``, changing nothing."""
        if not 0 <= counter <= MAX_COUNTER:
            raise UsageError(f"counter {counter!r} is not a {AUTH_COUNTER_BITS}-bit number")
        if counter > self.top:
            return Verdict.NEW
        if counter == 0 or self.top - counter >= self.size:
            return Verdict.STALE
        return Verdict.DUPLICATE if self.ring >> (counter % self.size) & 1 else Verdict.NEW

    def accept(self, counter: int) -> None:
        """Record ``counter`` (its tag verified and its verdict NEW), moving the edge if it is ahead."""
        verdict = self.check(counter)
        if verdict is not Verdict.NEW:
            raise UsageError(f"counter {counter} is {verdict.value}: only a new counter is accepted")
        ahead = counter - self.top
        if ahead >= self.size:
            self.ring = 0
        elif ahead > 0:  # clear the slots of top+1 .. counter, wrapping round the ring
            start = (self.top + 1) % self.size
            end = start + ahead
            mask = (
                ((1 << ahead) - 1) << start
                if end <= self.size
                else (((1 << (self.size - start)) - 1) << start) | ((1 << (end - self.size)) - 1)
            )
            self.ring &= ~mask
        self.top = max(self.top, counter)
        self.ring |= 1 << (counter % self.size)

    def copy(self) -> ReplayWindow:
        return ReplayWindow(self.size, self.top, self.ring)

    def __eq__(self, other: object) -> bool:
        return isinstance(other, ReplayWindow) and (self.size, self.top, self.ring) == (
            other.size,
            other.top,
            other.ring,
        )

    def __repr__(self) -> str:
        return f"ReplayWindow(size={self.size}, top={self.top}, ring=0x{self.ring:x})"


class SendCounter:
    """A sender's counters: the next to use and how far a durable write has reserved."""

    __slots__ = ("next", "reserved")

    def __init__(self, reserved: int = 0) -> None:
        if not 0 <= reserved <= MAX_COUNTER:
            raise UsageError(f"counter reservation {reserved!r} out of range")
        self.reserved = reserved
        self.next = reserved + 1  # after a reboot: continue past everything reserved

    def take(self) -> tuple[int, bool]:
        """The next counter, and whether the reservation moved (then save it before sending)."""
        if self.next > MAX_COUNTER:
            raise UsageError("the counters of this key epoch are spent: rotate to the next epoch")
        counter = self.next
        self.next += 1
        moved = counter > self.reserved
        if moved:
            self.reserved = min(MAX_COUNTER, counter + AUTH_COUNTER_RESERVE - 1)
        return counter, moved

    def top_up(self) -> bool:
        """Reserve ahead when fewer than half a block of reserved counters is
        left, so that the save runs while counters already saved are still
        being used; whether the reservation moved (then save it)."""
        left = self.reserved - self.next + 1
        if left >= AUTH_COUNTER_RESERVE // 2 or self.reserved >= MAX_COUNTER:
            return False
        self.reserved = min(MAX_COUNTER, self.next - 1 + AUTH_COUNTER_RESERVE)
        return True
