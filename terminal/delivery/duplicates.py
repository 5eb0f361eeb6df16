"""Recognising messages already delivered: a window of completed ids per source.

Modelled on the anti-replay window of RFC 4303 (s3.4.3 and Appendix A): the
right edge is the highest *completed* message id; ids left of the window are
too old to judge; inside it each id completes once.  Message ids travel as
16 bits; the window rebuilds the high bits as RFC 4303 Appendix A does for
extended sequence numbers, so wrap-around is invisible.  The window moves
only when a message completes (its CRC-32C verified), never on a fragment.
"""

from __future__ import annotations

import enum
from collections import OrderedDict
from collections.abc import Hashable

from ionotrail.terminal.limits import MESSAGE_ID_BITS

_ID_SPACE = 1 << MESSAGE_ID_BITS
_HALF = _ID_SPACE >> 1


class Verdict(enum.Enum):
    NEW = "new"
    DUPLICATE = "duplicate"
    STALE = "stale"
    """Older than the window: it cannot be told from a message delivered."""


# Held as module globals: a member read off its class costs ~70 ns on Python 3.11
# (EnumType's __getattr__), and one is read per fragment received.
_NEW, _DUPLICATE, _STALE = Verdict.NEW, Verdict.DUPLICATE, Verdict.STALE


class CompletedWindow:
    """Completed ids of one source: the highest, and a bitmap behind it."""

    __slots__ = ("bitmap", "size", "top")

    def __init__(self, size: int, top: int | None = None, bitmap: int = 0) -> None:
        self.size = size
        self.top = top  # extended (unwrapped) id of the highest completed message
        self.bitmap = bitmap  # bit i set: id top - i completed

    def extend(self, wire_id: int) -> int:
        """The unwrapped id nearest the right edge with these low 16 bits."""
        if self.top is None:
            return wire_id
        candidate = (self.top & ~(_ID_SPACE - 1)) | wire_id
        if candidate > self.top + _HALF:
            candidate -= _ID_SPACE
        elif candidate <= self.top - _HALF:
            candidate += _ID_SPACE
        return candidate

    def verdict(self, seq: int) -> Verdict:
        if self.top is None or seq > self.top:
            return _NEW
        behind = self.top - seq
        if behind >= self.size:
            return _STALE
        return _DUPLICATE if self.bitmap >> behind & 1 else _NEW

    def complete(self, seq: int) -> None:
        """Record that message ``seq`` was delivered (its verdict was NEW)."""
        if self.top is None:
            self.top, self.bitmap = seq, 1
        elif seq > self.top:
            self.bitmap = (self.bitmap << (seq - self.top) | 1) & ((1 << self.size) - 1)
            self.top = seq
        elif self.top - seq < self.size:
            self.bitmap |= 1 << (self.top - seq)
        # else: older than the window; nothing to remember, the bitmap stays bounded


class DuplicateFilter:
    """Completed-id windows for up to ``max_sources`` sources, least recently
    used evicted first (and counted: an evicted source's window is lost)."""

    def __init__(self, window: int, max_sources: int) -> None:
        self.window = window
        self.max_sources = max_sources
        self.evicted = 0
        self._windows: OrderedDict[Hashable, CompletedWindow] = OrderedDict()

    def __len__(self) -> int:
        return len(self._windows)

    def classify(self, source: Hashable, wire_id: int) -> tuple[Verdict, int]:
        """Verdict on a 16-bit id from ``source``, with its unwrapped value."""
        window = self._windows.get(source)
        if window is None:
            return _NEW, wire_id
        self._windows.move_to_end(source)
        seq = window.extend(wire_id)
        return window.verdict(seq), seq

    def complete(self, source: Hashable, seq: int) -> None:
        window = self._windows.get(source)
        if window is None:
            if len(self._windows) >= self.max_sources:
                self._windows.popitem(last=False)
                self.evicted += 1
            window = self._windows[source] = CompletedWindow(self.window)
        self._windows.move_to_end(source)
        window.complete(seq)

    def snapshot(self) -> list[tuple[Hashable, int, int]]:
        """State to store durably: (source, top, bitmap) per source, oldest first."""
        return [(source, w.top, w.bitmap) for source, w in self._windows.items() if w.top is not None]

    def restore(self, state: list[tuple[Hashable, int, int]]) -> None:
        """Replace the state with a snapshot (for example after a reboot)."""
        self._windows.clear()
        for source, top, bitmap in state[-self.max_sources :]:
            self._windows[source] = CompletedWindow(self.window, top, bitmap & ((1 << self.window) - 1))
