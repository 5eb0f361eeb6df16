"""Keyed random draws: the n-th draw of a stream is a pure function of (key, n).

A simulation that skips work (a probe nobody would act on, a window of
trails nobody asks about) must not shift the draws of what it does simulate.
A sequential generator cannot promise that: every skipped call moves it.
Here each stream has a 64-bit key and draw ``n`` is SplitMix64's output
function applied to ``key + (n + 1) x golden gamma``: exactly the n-th output
of a SplitMix64 generator seeded with ``key`` (Steele, Lea and Flood,
"Fast splittable pseudorandom number generators", OOPSLA 2014; the
constants are those of its public-domain C reference).  The scalar form is
plain Python (about a microsecond a draw); :func:`uniforms` is its numpy
twin for a stretch of counters at once (tests/test_draws.py checks both
against each other and the reference's first outputs).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

MASK = (1 << 64) - 1
GAMMA = 0x9E3779B97F4A7C15
_M1 = 0xBF58476D1CE4E5B9
_M2 = 0x94D049BB133111EB
_UNIT = 2.0**-53


def mix64(z: int) -> int:
    """SplitMix64's output function of a 64-bit state."""
    z = ((z ^ (z >> 30)) * _M1) & MASK
    z = ((z ^ (z >> 27)) * _M2) & MASK
    return z ^ (z >> 31)


def output(key: int, n: int) -> int:
    """The n-th 64-bit output (from 0) of SplitMix64 seeded with ``key``."""
    return mix64((key + (n + 1) * GAMMA) & MASK)


def stream_key(seed: int, *path: int) -> int:
    """The key of a named stream under ``seed``: each element of ``path``
    (a tag, an index) is folded in through one SplitMix64 step, so keys of
    different paths are unrelated."""
    key = seed & MASK
    for part in path:
        key = output(key ^ (part & MASK), 0)
    return key


def uniform(key: int, n: int) -> float:
    """Draw n of stream ``key`` as a float in [0, 1) (the top 53 bits)."""
    return (output(key, n) >> 11) * _UNIT


def below(key: int, n: int, bound: int) -> int:
    """Draw n of stream ``key`` as an integer in [0, bound) (multiply-shift:
    the bias is below bound / 2^64)."""
    if bound <= 0:
        raise ValueError(f"bound must be positive, not {bound}")
    return (output(key, n) * bound) >> 64


def uniforms(key: int, first: int, count: int) -> NDArray[np.float64]:
    """Draws ``first .. first + count - 1`` of stream ``key``: :func:`uniform`, vectorised
    (numpy's uint64 arithmetic wraps modulo 2^64, as the reference's does)."""
    return uniforms_at(key, np.arange(first, first + count, dtype=np.int64))


def uniforms_at(key: int, counters: NDArray[np.int64]) -> NDArray[np.float64]:
    """Draws ``counters`` (any order, each at least 0) of stream ``key``: :func:`uniform`, vectorised."""
    n = counters.astype(np.uint64) + np.uint64(1)
    with np.errstate(over="ignore"):
        z = np.uint64(key) + n * np.uint64(GAMMA)
        z = (z ^ (z >> np.uint64(30))) * np.uint64(_M1)
        z = (z ^ (z >> np.uint64(27))) * np.uint64(_M2)
    z = z ^ (z >> np.uint64(31))
    return (z >> np.uint64(11)).astype(np.float64) * _UNIT
