"""Keyed draws (harness/channel/draws.py) against SplitMix64's reference outputs.

Check values: the first outputs of the C reference (Vigna's public-domain
splitmix64.c, the generator of Steele, Lea and Flood, OOPSLA 2014) seeded
with 0 and with 1234567, recalled from memory of that reference's published
outputs (two independent seeds agreeing is the check that the memory is right).
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from ionotrail.harness.channel import draws


def test_outputs_match_the_reference_seeded_with_zero() -> None:
    assert [draws.output(0, n) for n in range(3)] == [0xE220A8397B1DCDAF, 0x6E789E6AA1B965F4, 0x06C45D188009454F]


def test_outputs_match_the_reference_seeded_with_1234567() -> None:
    assert [draws.output(1234567, n) for n in range(2)] == [6457827717110365317, 3203168211198807973]


@given(st.integers(0, 2**64 - 1), st.integers(0, 2**40), st.integers(0, 64))
def test_the_numpy_twin_gives_the_same_draws(key: int, first: int, count: int) -> None:
    vector = draws.uniforms(key, first, count)
    assert vector.tolist() == [draws.uniform(key, n) for n in range(first, first + count)]


def test_draws_are_uniform_and_streams_unrelated() -> None:
    a = draws.uniforms(draws.stream_key(7, 1), 0, 200_000)
    b = draws.uniforms(draws.stream_key(7, 2), 0, 200_000)
    assert 0.0 <= a.min() and a.max() < 1.0
    assert abs(a.mean() - 0.5) < 0.003  # 5 sigma of a mean of 200,000 uniforms is 0.0032
    assert abs(np.corrcoef(a, b)[0, 1]) < 0.012  # 5 sigma of a correlation of independent samples
    counts = np.bincount((a * 10).astype(int), minlength=10)
    assert counts.min() > 19_000 and counts.max() < 21_000


def test_below_stays_in_range_and_refuses_an_empty_range() -> None:
    values = {draws.below(3, n, 6) for n in range(1000)}
    assert values == set(range(6))
    with pytest.raises(ValueError, match="bound must be positive"):
        draws.below(3, 0, 0)
