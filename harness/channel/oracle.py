"""The oracle bound: the most payload any terminal could expect from the uplink.

An oracle knows every opening's signal-to-noise trajectory in advance and
never waits for a probe.  For each opening it chooses the sequence of
fragment lengths (1 to ``max_payload`` payload bytes, each with the real
fragment overhead) that maximises the expected payload delivered, paying the
radio's turnaround before its first frame; the bound of a run is the sum
over its openings.  It replaces the open-time bound (``capacity_bits``) as
the yardstick of a policy's efficiency: short frames get through below the
BER threshold that defines "open", and every frame pays its overhead.

How a frame fares is the channel's own model (:mod:`ionotrail.harness.channel.model`):
the strongest trail's Eb/N0 over the frame's airtime (``Channel._envelope``),
the modulation's bit-error rate (``physics.bit_error_rate``), and a success
probability of ``exp(bits x mean(log(1 - BER)))`` over points across the
frame.  The model takes up to 16 points per frame; the oracle takes one per
byte, so that one prefix sum serves every frame of an opening
(``tests/test_oracle.py`` checks the two agree).

The dynamic programme runs on a grid of ``step_bytes`` byte times from the
opening's first possible frame.  With V[i] the best expected payload from
grid step i on, ``V[i] = max(V[i + 1], max_L 8 L p(i, L) + V[i + D(L)])``
where a frame of L payload bytes occupies ``D(L) = floor((L + overhead) /
step_bytes)`` steps.  With ``step_bytes = 1`` this is exact on the byte
grid.  Coarser steps relax it in the oracle's favour: lengths are grouped by
D, each group credited with its longest payload at the success probability
of its shortest frame, and a frame may overlap the next by less than a step,
so any schedule of real frames (starts rounded down to the grid) is matched
or beaten as long as the envelope does not rise within a step.  Every frame
needs at least ``ceil(overhead / step_bytes)`` steps, so that many steps of
each opening are solved at once, and all openings advance together (sorted
by length, the active ones are a prefix): the work is one numpy pass over
(steps x length groups) per block, ``O(sum of steps x max_payload /
step_bytes)`` in all.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterator

import numpy as np
from ionotrail.harness.channel import physics
from ionotrail.harness.channel.model import FADED_TAUS, Channel
from ionotrail.terminal.limits import FRAGMENT_OVERHEAD_BYTES, MAX_FRAGMENT_PAYLOAD
from numpy.typing import NDArray

Array = NDArray[np.float64]

STEP_BYTES = 2
"""Grid of the dynamic programme in the report, in byte times (3.3 ms at 4800
bit/s): on the demo day 0.8 % more generous than 1, the exact byte grid, at a quarter of its cost."""
P_MIN = 1e-6
"""An opening ends where even the shortest frame arrives with probability below this."""


@dataclasses.dataclass(frozen=True)
class OpeningPlan:
    """One opening as the oracle sees it: ``log_ok[k]`` is the mean log success
    per bit of byte k after the first possible frame (``start_s``); frames may
    start at grid steps 0 .. ``steps - 1`` and run on into the padding."""

    start_s: float
    steps: int
    log_ok: Array


def frame_log_success(log_ok: Array, first_byte: int, frame_bytes: int) -> float:
    """Natural log of the success probability of a frame of ``frame_bytes`` bytes
    starting at byte ``first_byte`` of an opening (the oracle's per-frame model)."""
    return 8.0 * float(np.sum(log_ok[first_byte : first_byte + frame_bytes]))


def _groups(step_bytes: int, max_payload: int, overhead: int) -> tuple[NDArray[np.int64], NDArray[np.int64], Array]:
    """Length groups by steps occupied: (D, shortest frame bytes, longest payload bits)."""
    frames = np.arange(1, max_payload + 1) + overhead
    d = frames // step_bytes
    steps = np.unique(d)
    shortest = np.array([frames[d == s].min() for s in steps], dtype=np.int64)
    longest = np.array([frames[d == s].max() - overhead for s in steps], dtype=np.float64)
    return steps.astype(np.int64), shortest, 8.0 * longest


def plan_values(openings: list[OpeningPlan], *, step_bytes: int = STEP_BYTES, max_payload: int = MAX_FRAGMENT_PAYLOAD,
                overhead: int = FRAGMENT_OVERHEAD_BYTES) -> Array:
    """The oracle's expected payload bits for each opening (the dynamic programme above)."""
    if not openings:
        return np.zeros(0)
    d, shortest, payload_bits = _groups(step_bytes, max_payload, overhead)
    block = int(d.min())
    if block < 1:
        raise ValueError(f"a step of {step_bytes} bytes is longer than the shortest frame")
    reach = int(d.max()) + 1  # steps past the last start a frame can end in
    order = sorted(range(len(openings)), key=lambda k: -openings[k].steps)
    count = len(order)
    padded = np.array([openings[k].steps + (-openings[k].steps) % block for k in order], dtype=np.int64)
    front = padded - np.array([openings[k].steps for k in order], dtype=np.int64)
    need_bytes = [int(padded[j] + reach) * step_bytes + int(shortest.max()) for j in range(count)]
    # One byte array for all openings: front padding (never read by a real step),
    # the opening's bytes, and whatever the plan carries past its end.
    byte_base = np.zeros(count, dtype=np.int64)
    g = np.zeros(sum(need_bytes))
    at = 0
    for j, k in enumerate(order):
        byte_base[j] = at
        src = openings[k].log_ok
        lo = int(front[j]) * step_bytes
        n = min(len(src), need_bytes[j] - lo)
        g[at + lo : at + lo + n] = src[:n]
        if n < need_bytes[j] - lo:
            g[at + lo + n : at + need_bytes[j]] = math.log(0.5)  # past the known bytes: every bit a coin toss
        at += need_bytes[j]
    cum = np.concatenate([[0.0], np.cumsum(g)])
    step_base = np.concatenate([[0], np.cumsum(padded + reach)[:-1]]).astype(np.int64)
    value = np.zeros(int(np.sum(padded + reach)))
    offsets = np.arange(block, dtype=np.int64)
    rounds = int(padded[0]) // block
    active = count
    for r in range(rounds):
        while active and padded[active - 1] <= r * block:
            active -= 1
        first = padded[:active] - (r + 1) * block  # local step of each block's first element
        local = first[:, None] + offsets[None, :]  # (active, block)
        steps = step_base[:active, None] + local
        bytes_at = byte_base[:active, None] + local * step_bytes
        log_p = 8.0 * (cum[bytes_at[..., None] + shortest] - cum[bytes_at[..., None]])
        candidates = payload_bits * np.exp(log_p) + value[steps[..., None] + d]
        best = candidates.max(axis=2)
        best[:, -1] = np.maximum(best[:, -1], value[steps[:, -1] + 1])  # or wait a step
        value[steps] = np.maximum.accumulate(best[:, ::-1], axis=1)[:, ::-1]
    out = np.zeros(count)
    out[order] = value[step_base + front]
    return out


def openings(channel: Channel, *, until: float, turnaround: float, burst_silence: float, step_bytes: int = STEP_BYTES,
             max_payload: int = MAX_FRAGMENT_PAYLOAD, overhead: int = FRAGMENT_OVERHEAD_BYTES, p_min: float = P_MIN) -> list[OpeningPlan]:
    """The uplink's openings before ``until`` as the oracle plans them (see :func:`iter_openings`)."""
    return list(iter_openings(channel, until=until, turnaround=turnaround, burst_silence=burst_silence, step_bytes=step_bytes,
                              max_payload=max_payload, overhead=overhead, p_min=p_min))  # fmt: skip


def iter_openings(channel: Channel, *, until: float, turnaround: float, burst_silence: float, step_bytes: int = STEP_BYTES,
                  max_payload: int = MAX_FRAGMENT_PAYLOAD, overhead: int = FRAGMENT_OVERHEAD_BYTES,
                  p_min: float = P_MIN) -> Iterator[OpeningPlan]:  # fmt: skip
    """The uplink's openings before ``until`` as the oracle plans them, one at a time.

    An opening is a period in which the shortest fragment could arrive with
    probability above ``p_min`` (``Channel.audible_windows``), periods less
    than ``burst_silence`` apart joined (a burst can bridge them, so no new
    turnaround); the first frame goes ``turnaround`` after its start."""
    trails = channel.trails
    if trails is None or not len(trails):
        return []
    starts, ends = channel.audible_windows("up", 8 * (1 + overhead), p_min)
    joined: list[list[float]] = []
    for a, b in zip(starts, ends, strict=True):
        if a >= until:
            break
        if joined and a - joined[-1][1] < burst_silence:
            joined[-1][1] = max(joined[-1][1], b)
        else:
            joined.append([a, b])
    byte_s = 8.0 / channel.params["up"].bit_rate
    direction = "up"
    live_end = trails.t + trails.hold[direction] + FADED_TAUS * trails.tau[direction]
    longest_life = float(np.max(live_end - trails.t))  # no trail that began earlier than this is still live
    modulation = channel.modulation
    tail_bytes = (max_payload + overhead + 2 * step_bytes) + 1
    for a, b in joined:
        first = a + turnaround
        end = min(b, until)
        steps = math.ceil((end - first) / (step_bytes * byte_s))
        if steps <= 0:
            continue
        n = steps * step_bytes + tail_bytes
        t = first + (np.arange(n) + 0.5) * byte_s
        hi = int(np.searchsorted(trails.t, t[-1], side="right"))
        lo = int(np.searchsorted(trails.t, first - longest_life, side="left"))  # trails sorted by start
        idx = lo + np.nonzero(live_end[lo:hi] > first)[0]
        ebn0 = np.zeros(n)
        for i in idx.tolist():
            ebn0 = np.maximum(ebn0, channel._envelope(direction, np.full(n, i, dtype=np.int64), t))
        ber = physics.bit_error_rate(modulation, ebn0)
        yield OpeningPlan(first, steps, np.log1p(-np.minimum(ber, 0.5)))


def oracle_bound_bits(channel: Channel, *, until: float, turnaround: float, burst_silence: float, step_bytes: int = STEP_BYTES,
                      max_payload: int = MAX_FRAGMENT_PAYLOAD, overhead: int = FRAGMENT_OVERHEAD_BYTES) -> float:
    """Expected uplink payload bits of the oracle over every opening before ``until``.

    Openings are independent, so they are planned :data:`ORACLE_BATCH` at a time:
    memory stays flat however long the run."""
    total, batch = 0.0, []
    for plan in iter_openings(channel, until=until, turnaround=turnaround, burst_silence=burst_silence, step_bytes=step_bytes,
                              max_payload=max_payload, overhead=overhead):  # fmt: skip
        batch.append(plan)
        if len(batch) == ORACLE_BATCH:
            total += float(np.sum(plan_values(batch, step_bytes=step_bytes, max_payload=max_payload, overhead=overhead)))
            batch = []
    if batch:
        total += float(np.sum(plan_values(batch, step_bytes=step_bytes, max_payload=max_payload, overhead=overhead)))
    return total


ORACLE_BATCH = 128
"""Openings planned together: enough to keep numpy's passes long, few enough that
the arrays stay a few megabytes (a demo day has about 1,200 openings)."""
