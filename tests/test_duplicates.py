"""The completed-id window, after the anti-replay window of RFC 4303."""

from __future__ import annotations

import pytest
from hypothesis import given
from hypothesis import strategies as st
from ionotrail.terminal.delivery.duplicates import CompletedWindow, DuplicateFilter, Verdict


def _run(window: int, arrivals: list[int]) -> list[str]:
    ids = DuplicateFilter(window, max_sources=4)
    out = []
    for wire_id in arrivals:
        verdict, seq = ids.classify("t", wire_id)
        if verdict is Verdict.NEW:
            ids.complete("t", seq)
        out.append(verdict.value)
    return out


def test_worked_example_window_of_four() -> None:
    # Window 4, arrivals 1 2 3 5 4 4 9 6 5 10 7: accept x5, reject duplicate,
    # accept 9 and 6, reject 5 as too old, accept 10 and 7 (derived from the
    # RFC 4303 s3.4.3 rules: right edge = highest accepted, left of window rejected).
    assert _run(4, [1, 2, 3, 5, 4, 4, 9, 6, 5, 10, 7]) == [
        "new", "new", "new", "new", "new", "duplicate", "new", "new", "stale", "new", "new",
    ]


def test_sixty_four_is_the_default_and_thirty_two_works() -> None:
    # RFC 4303 s3.4.3: a window of 32 must be supported; 64 is the default.
    from ionotrail.terminal.limits import DEFAULT_LIMITS

    assert DEFAULT_LIMITS.duplicate_window == 64
    assert _run(32, [100, 69, 68, 69]) == ["new", "new", "stale", "duplicate"]


def test_ids_rebuilt_across_wrap_around() -> None:
    # 16-bit ids: 65534, 65535, 0, 1 are consecutive (RFC 4303 Appendix A style).
    ids = DuplicateFilter(64, 4)
    seqs = []
    for wire_id in (65534, 65535, 0, 1):
        verdict, seq = ids.classify("t", wire_id)
        assert verdict is Verdict.NEW
        ids.complete("t", seq)
        seqs.append(seq)
    assert seqs == [65534, 65535, 65536, 65537]
    assert ids.classify("t", 65535)[0] is Verdict.DUPLICATE
    assert ids.classify("t", 2) == (Verdict.NEW, 65538)


@pytest.mark.property
@given(st.integers(0, 2**20), st.integers(-(2**15) + 1, 2**15))
def test_extension_recovers_any_id_within_half_the_space(top: int, offset: int) -> None:
    window = CompletedWindow(64, top=top, bitmap=1)
    seq = top + offset
    assert window.extend(seq & 0xFFFF) == seq


def test_snapshot_survives_a_restart() -> None:
    before = DuplicateFilter(64, 8)
    for seq in (5, 6, 8):
        before.complete("t", seq)
    after = DuplicateFilter(64, 8)
    after.restore(before.snapshot())
    assert [after.classify("t", i)[0] for i in (5, 6, 7, 8, 9)] == [
        Verdict.DUPLICATE, Verdict.DUPLICATE, Verdict.NEW, Verdict.DUPLICATE, Verdict.NEW,
    ]


def test_least_recently_used_source_is_evicted_and_counted() -> None:
    ids = DuplicateFilter(64, max_sources=2)
    ids.complete("a", 1)
    ids.complete("b", 1)
    ids.classify("a", 2)  # touch a
    ids.complete("c", 1)
    assert ids.evicted == 1 and len(ids) == 2
    assert ids.classify("b", 1)[0] is Verdict.NEW  # b was forgotten
    assert ids.classify("a", 1)[0] is Verdict.DUPLICATE
