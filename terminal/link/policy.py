"""Fragment sizing: how many payload bytes the next fragment of a burst carries.

A meteor-trail opening decays roughly exponentially and, for underdense
trails, the time it has left is memoryless: whatever its age, the remaining
open time is exponentially distributed with mean about 2 tau.  A fragment of
L payload bits and H overhead bits then survives with probability
``exp(-(L+H)/a)``, ``a = 2 tau R`` at bit rate R, and sending fragments back
to back until the path closes carries on average ``L / (exp((L+H)/a) - 1)``
payload bits; its maximum solves ``1 - exp(-(L+H)/a) = L/a``.  Short
fragments waste airtime on headers, long ones die with the trail.

:class:`Adaptive` estimates tau from the SNR of the probes heard in the
current burst (the slope of SNR in dB against time) and sizes every fragment
from that result; :class:`Fixed` always sends one size; :class:`StopAndWait`
sends one fragment and waits for its acknowledgement, the textbook baseline.
:func:`by_name` builds any of them from the name a command line gives.
"""

from __future__ import annotations

import math
from typing import Protocol

from ionotrail.terminal.errors import UsageError
from ionotrail.terminal.limits import FRAGMENT_OVERHEAD_BYTES, MAX_FRAGMENT_PAYLOAD

OVERHEAD_BITS = 8 * FRAGMENT_OVERHEAD_BYTES
MIN_PAYLOAD = 8  # bytes; below this a fragment is mostly header (common practice, no source)
LEARNING_GAIN = 1 / 8
"""How far each burst's fitted decay moves the path's typical one: an
exponentially weighted average with the gain RFC 6298 (s2) gives TCP's
smoothed round-trip time, alpha = 1/8, borrowed for the same job of
following a slowly changing path without chasing every sample."""
DB_PER_NEPER = 10 / math.log(10)  # a power decaying as exp(-t/tau) falls 4.343/tau dB per second
TAU_RANGE_S = (0.03, 30.0)  # estimates are clamped to plausible trail lifetimes
MAX_SNR_SAMPLES = 8  # probes kept per burst for the slope fit
LOSS_MEMORY = 0.97  # weight kept per settled fragment: the loss record spans about 30
MIN_LOSSES = 0.5  # weighted losses before the record is trusted
RECENT_SAMPLES = 3  # the short fit, which sees a plateau turn into decay at once
MIN_FIT_SPAN_S = 0.05  # a slope over less time than this is noise
SIZE_STEP = math.log(1.01)  # sizes are computed for a in 1 % steps and remembered


class FragmentPolicy(Protocol):
    name: str
    waits_for_ack: bool
    """True when every fragment must be acknowledged before the next is sent."""

    def burst_started(self, now: float) -> None: ...

    def probe_heard(self, now: float, snr_db: float) -> None: ...

    def payload_bytes(self, now: float) -> int: ...

    def fragment_settled(self, frame_bytes: int, lost: bool) -> None:
        """An earlier fragment was confirmed or shown lost while the path was live."""


def optimal_payload_bits(a_bits: float, overhead_bits: float) -> float:
    """L maximising ``L / (exp((L+H)/a) - 1)``: the root of
    ``1 - exp(-(L+H)/a) = L/a`` on (0, a), found by bisection.

    The left side minus the right is positive at L = 0 and negative at
    L = a, and decreasing in between, so the root is unique.
    """
    if a_bits <= 0:
        return 0.0
    low, high = 0.0, a_bits
    for _ in range(60):
        mid = (low + high) / 2
        if 1 - math.exp(-(mid + overhead_bits) / a_bits) > mid / a_bits:
            low = mid
        else:
            high = mid
    return (low + high) / 2


def expected_payload_bits(payload_bits: float, a_bits: float, overhead_bits: float) -> float:
    """Mean payload bits one burst carries in back-to-back fragments of this size."""
    return payload_bits / math.expm1((payload_bits + overhead_bits) / a_bits)


def _fit(samples: list[tuple[float, float]]) -> float | None:
    """tau from the least-squares slope of SNR (dB) against time; None without
    two probes far enough apart."""
    n = len(samples)
    if n < 2:
        return None
    t_first = samples[0][0]
    if samples[-1][0] - t_first < MIN_FIT_SPAN_S:
        return None
    st = ss = stt = sts = 0.0
    for t, snr in samples:
        t -= t_first  # offsets keep the sums well conditioned
        st += t
        ss += snr
        stt += t * t
        sts += t * snr
    slope = (n * sts - st * ss) / (n * stt - st * st)  # dB per second
    low, high = TAU_RANGE_S
    if slope >= -DB_PER_NEPER / high:  # flat or rising: an overdense plateau
        return high
    return min(high, max(low, -DB_PER_NEPER / slope))


class Fixed:
    """Every fragment carries the same number of payload bytes."""

    waits_for_ack = False

    def __init__(self, size: int) -> None:
        if not MIN_PAYLOAD <= size <= MAX_FRAGMENT_PAYLOAD:
            raise UsageError(f"fixed fragment size must be {MIN_PAYLOAD} to {MAX_FRAGMENT_PAYLOAD} bytes, not {size}")
        self.size = size
        self.name = f"fixed-{size}"

    def burst_started(self, now: float) -> None:
        pass

    def probe_heard(self, now: float, snr_db: float) -> None:
        pass

    def payload_bytes(self, now: float) -> int:
        return self.size

    def fragment_settled(self, frame_bytes: int, lost: bool) -> None:
        pass


class StopAndWait(Fixed):
    """One fragment, then wait for the acknowledgement before the next."""

    waits_for_ack = True

    def __init__(self, size: int = 64) -> None:
        super().__init__(size)
        self.name = "stop-and-wait"


class Adaptive:
    """Sizes each fragment for the decay it measures on the probes it hears.

    ``tau_scale`` converts the downlink's decay to the uplink's: tau grows as
    the wavelength squared, so it is ``(f_down / f_up) ** 2``.  Until a burst
    has given two probes far enough apart, the estimate is the running mean of
    earlier bursts' estimates (``prior_tau_s`` at first).
    """

    waits_for_ack = False
    name = "adaptive"

    def __init__(self, bit_rate: float, *, tau_scale: float = 1.0, prior_tau_s: float = 0.3, overhead_bits: float = OVERHEAD_BITS) -> None:
        if not (bit_rate > 0 and tau_scale > 0 and prior_tau_s > 0):
            raise UsageError("bit_rate, tau_scale and prior_tau_s must be positive")
        self.bit_rate = bit_rate
        self.tau_scale = tau_scale
        self.overhead_bits = overhead_bits
        self.typical_tau_s = prior_tau_s
        self._samples: list[tuple[float, float]] = []
        self._tau_s: float | None = None
        self._fitted = True
        self._exposure_bits = 0.0  # exponentially weighted air bits of settled fragments
        self._losses = 0.0  # and how many of them were lost
        # a in 1 % steps -> payload bytes.  a lies between one frame's bits (the loss
        # record: at most one loss per settled fragment) and 2 x 30 s x R (TAU_RANGE_S),
        # so the cache holds at most about a thousand entries.
        self._sizes: dict[int, int] = {}

    def burst_started(self, now: float) -> None:
        self._refit()
        if self._tau_s is not None:  # learn the path's typical decay, slowly
            self.typical_tau_s += (self._tau_s - self.typical_tau_s) * LEARNING_GAIN
        self._samples.clear()
        self._tau_s = None
        self._fitted = True

    def probe_heard(self, now: float, snr_db: float) -> None:
        if not math.isfinite(snr_db):
            return
        self._samples.append((now, snr_db))
        del self._samples[:-MAX_SNR_SAMPLES]
        self._fitted = False  # fitted when a fragment is next sized, not per probe

    def _refit(self) -> None:
        if not self._fitted:
            samples = self._samples
            long = _fit(samples)
            # With no more samples than the short fit takes, the two fits are one.
            short = long if len(samples) <= RECENT_SAMPLES else _fit(samples[-RECENT_SAMPLES:])
            if long is None or short is None:
                self._tau_s = short if long is None else long
            else:
                self._tau_s = min(long, short)
            self._fitted = True

    @property
    def tau_estimate_s(self) -> float:
        """The uplink decay the next fragment is sized for."""
        self._refit()
        return (self._tau_s if self._tau_s is not None else self.typical_tau_s) * self.tau_scale

    def fragment_settled(self, frame_bytes: int, lost: bool) -> None:
        self._exposure_bits = self._exposure_bits * LOSS_MEMORY + 8 * frame_bytes
        self._losses = self._losses * LOSS_MEMORY + lost

    @property
    def a_bits(self) -> float:
        """The survival scale ``a`` of the optimal-length result, in bits: the
        smaller of the decay's (2 tau R) and the one the live path's recent
        losses show (air bits per loss), which is what limits fragments on a
        fading overdense plateau, where the SNR shows no decay."""
        a_decay = 2 * self.tau_estimate_s * self.bit_rate
        if self._losses < MIN_LOSSES:
            return a_decay
        return min(a_decay, self._exposure_bits / self._losses)

    def payload_bytes(self, now: float) -> int:
        step = round(math.log(self.a_bits) / SIZE_STEP)
        size = self._sizes.get(step)
        if size is None:
            bits = optimal_payload_bits(math.exp(step * SIZE_STEP), self.overhead_bits)
            size = self._sizes[step] = max(MIN_PAYLOAD, min(MAX_FRAGMENT_PAYLOAD, round(bits / 8)))
        return size


FIXED_SIZES = (32, 64, 128, 256)
POLICY_NAMES = ("adaptive", *(f"fixed-{n}" for n in FIXED_SIZES), "stop-and-wait")


def by_name(name: str, bit_rate: float, *, tau_scale: float = 1.0) -> FragmentPolicy:
    """``adaptive``, ``stop-and-wait`` or ``fixed-N`` (N payload bytes per fragment)."""
    if name == "adaptive":
        return Adaptive(bit_rate, tau_scale=tau_scale)
    if name == "stop-and-wait":
        return StopAndWait()
    if name.startswith("fixed-") and name[6:].isdigit():
        return Fixed(int(name[6:]))
    raise UsageError(f"unknown fragment policy {name!r}; expected adaptive, stop-and-wait or fixed-N (N from {MIN_PAYLOAD} to {MAX_FRAGMENT_PAYLOAD})")
