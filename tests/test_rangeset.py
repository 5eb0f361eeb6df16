"""RangeSet against a plain set of integers as the model."""

from __future__ import annotations

import pytest
from hypothesis import given
from hypothesis import strategies as st
from ionotrail.terminal.delivery.rangeset import RangeSet

spans = st.tuples(st.integers(0, 60), st.integers(0, 60)).map(sorted).map(tuple)


def _model_ranges(points: set[int]) -> tuple[tuple[int, int], ...]:
    out: list[tuple[int, int]] = []
    for p in sorted(points):
        if out and out[-1][1] == p:
            out[-1] = (out[-1][0], p + 1)
        else:
            out.append((p, p + 1))
    return tuple(out)


@pytest.mark.property
@given(st.lists(st.tuples(st.booleans(), spans), max_size=30), spans)
def test_matches_a_set_of_integers(operations: list[tuple[bool, tuple[int, int]]], probe: tuple[int, int]) -> None:
    ranges, model = RangeSet(), set()
    for adding, (start, end) in operations:
        if adding:
            predicted = len(_model_ranges(model | set(range(start, end))))
            assert ranges.ranges_after_add(start, end) == predicted
            ranges.add(start, end)
            model |= set(range(start, end))
        else:
            ranges.discard(start, end)
            model -= set(range(start, end))
        assert ranges.ranges() == _model_ranges(model)
    start, end = probe
    window = set(range(start, end))
    assert ranges.contains(start, end) == window.issubset(model)
    assert set().union(*(range(s, e) for s, e in ranges.overlapping(start, end))) == window & model
    assert set().union(*(range(s, e) for s, e in ranges.gaps(start, end))) == window - model
    # first_gap is the first of gaps: from the lowest integer missing up to the next one held (or the end).
    missing = window - model
    first = ranges.first_gap(start, end)
    assert first == next(iter(ranges.gaps(start, end)), None)
    if not missing:
        assert first is None
    else:
        low = min(missing)
        assert first == (low, min([p for p in model if low < p < end], default=end))
    assert ranges.covered_within(start, end) == len(window & model)
    # extended_at_end: a range ends exactly at start, and [start, end) reaches (or touches) no other.
    extended = None
    if start < end and start - 1 in model and not any(start <= p <= end for p in model):
        extended = min(p for p in range(start) if set(range(p, start)) <= model)
    assert ranges.extended_at_end(start, end) == extended
    assert ranges.covered() == len(model)
    assert ranges.maximum() == (max(model) + 1 if model else 0)


def test_touching_ranges_merge() -> None:
    ranges = RangeSet([(0, 5), (10, 15)])
    ranges.add(5, 10)
    assert ranges.ranges() == ((0, 15),)
