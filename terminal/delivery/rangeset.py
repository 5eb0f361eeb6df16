"""A small sorted set of half-open integer ranges.

Used for the bytes a receiver holds and the bytes a sender has had
acknowledged.  Ranges are kept disjoint and non-adjacent, so the count of
ranges is also the count of islands between holes; callers cap it.
"""

from __future__ import annotations

from bisect import bisect_left, bisect_right
from collections.abc import Iterable, Iterator

ByteRange = tuple[int, int]


class RangeSet:
    """Disjoint, non-adjacent, ascending half-open ranges."""

    __slots__ = ("_ends", "_starts")

    def __init__(self, ranges: Iterable[ByteRange] = ()) -> None:
        self._starts: list[int] = []
        self._ends: list[int] = []
        for start, end in ranges:
            self.add(start, end)

    def __iter__(self) -> Iterator[ByteRange]:
        return zip(self._starts, self._ends, strict=True)

    def __len__(self) -> int:
        """Number of ranges (not of integers covered)."""
        return len(self._starts)

    def __eq__(self, other: object) -> bool:
        return isinstance(other, RangeSet) and self.ranges() == other.ranges()

    def __repr__(self) -> str:
        return f"RangeSet({self.ranges()!r})"

    def ranges(self) -> tuple[ByteRange, ...]:
        return tuple(self)

    def covered(self) -> int:
        """How many integers the set covers."""
        return sum(e - s for s, e in self)

    def _span(self, start: int, end: int) -> tuple[int, int]:
        """Indices [lo, hi) of the ranges that overlap or touch [start, end)."""
        return bisect_left(self._ends, start), bisect_right(self._starts, end)

    def ranges_after_add(self, start: int, end: int) -> int:
        """Number of ranges the set would hold after ``add(start, end)``."""
        if start >= end:
            return len(self)
        lo, hi = self._span(start, end)
        return len(self) - (hi - lo) + 1

    def add(self, start: int, end: int) -> None:
        if start >= end:
            return
        starts, ends = self._starts, self._ends
        if not ends or start > ends[-1]:  # beyond every range: a new last one
            starts.append(start)
            ends.append(end)
            return
        if start >= starts[-1]:  # overlaps or touches the last range only (the others end before it starts)
            ends[-1] = max(ends[-1], end)
            return
        lo, hi = self._span(start, end)
        if lo < hi:
            start = min(start, self._starts[lo])
            end = max(end, self._ends[hi - 1])
        self._starts[lo:hi] = [start]
        self._ends[lo:hi] = [end]

    def discard(self, start: int, end: int) -> None:
        """Remove [start, end) from the set."""
        if start >= end:
            return
        lo, hi = bisect_right(self._ends, start), bisect_left(self._starts, end)
        if lo >= hi:
            return
        keep_starts: list[int] = []
        keep_ends: list[int] = []
        if self._starts[lo] < start:
            keep_starts.append(self._starts[lo])
            keep_ends.append(start)
        if self._ends[hi - 1] > end:
            keep_starts.append(end)
            keep_ends.append(self._ends[hi - 1])
        self._starts[lo:hi] = keep_starts
        self._ends[lo:hi] = keep_ends

    def contains(self, start: int, end: int) -> bool:
        """True when every integer of [start, end) is in the set."""
        if start >= end:
            return True
        i = bisect_right(self._starts, start) - 1
        return i >= 0 and self._ends[i] >= end

    def overlapping(self, start: int, end: int) -> Iterator[ByteRange]:
        """The parts of [start, end) that the set covers."""
        i = max(0, bisect_right(self._starts, start) - 1)
        while i < len(self._starts) and self._starts[i] < end:
            s, e = max(self._starts[i], start), min(self._ends[i], end)
            if s < e:
                yield s, e
            i += 1

    def first_gap(self, start: int, end: int) -> ByteRange | None:
        """The first part of [start, end) the set does not cover (the first of
        :meth:`gaps`), or None when it covers it all: two bisections, no generator."""
        if start >= end:
            return None
        starts = self._starts
        i = bisect_right(starts, start)  # ranges [0, i) start at or before ``start``
        if i and self._ends[i - 1] > start:  # ``start`` is covered: the gap begins where its range ends
            start = self._ends[i - 1]
            if start >= end:
                return None
        # Ranges are non-adjacent, so range i (if any) starts beyond ``start``.
        if i < len(starts) and starts[i] < end:
            return start, starts[i]
        return start, end

    def covered_within(self, start: int, end: int) -> int:
        """How many integers of [start, end) the set covers (the sum over
        :meth:`overlapping`, without a generator)."""
        if start >= end:
            return 0
        starts, ends = self._starts, self._ends
        i = bisect_right(ends, start)  # the first range ending beyond ``start``
        total = 0
        while i < len(starts) and starts[i] < end:
            total += min(ends[i], end) - max(starts[i], start)
            i += 1
        return total

    def extended_at_end(self, start: int, end: int) -> int | None:
        """The start of the range that ends exactly at ``start``, when adding
        [start, end) would grow that one range and touch no other; else None."""
        if start >= end:
            return None
        ends = self._ends
        i = bisect_left(ends, start)
        if i == len(ends) or ends[i] != start:
            return None
        if i + 1 < len(ends) and self._starts[i + 1] <= end:  # it would reach the next range too
            return None
        return self._starts[i]

    def gaps(self, start: int, end: int) -> Iterator[ByteRange]:
        """The parts of [start, end) that the set does not cover."""
        cursor = start
        for s, e in self.overlapping(start, end):
            if s > cursor:
                yield cursor, s
            cursor = e
        if cursor < end:
            yield cursor, end

    def maximum(self) -> int:
        """One past the highest covered integer (0 when empty)."""
        return self._ends[-1] if self._ends else 0

    def clear(self) -> None:
        self._starts.clear()
        self._ends.clear()
