"""The simulated air between a master and a terminal: two ports over the channel.

:class:`Air` owns a :class:`~ionotrail.harness.channel.model.Channel` and gives each
station a :class:`SimulatedPort` that implements :class:`ionotrail.terminal.ports.Port`
on the running event loop's clock (virtual or real).  A frame sent on a port
occupies the air for its bits at the scenario's bit rate; whether it arrives
is drawn from the channel's frame-success probability over the SNR
trajectory it meets.  A frame that fails while the path was open at its
start (the receiver synchronised, bits went bad later) is delivered with one
bit flipped, so the receiver's CRC counts it; a frame sent into a closed path
is simply not heard.  What the receiver measures, Eb/N0 and frequency offset,
is that of the trail carrying the frame
(:meth:`~ionotrail.harness.channel.model.Channel.frame_carrier`).

The master's probe stream is simulated only where it can matter: probes are
emitted on their fixed cadence, but the loop is woken only for emissions
while some trail could still carry one (past the downlink's threshold-open
time: a short probe outlives it), and only probes that arrive intact are
reported.  A day with no trails costs no events at all.  And while the
terminal is indifferent to the probe (idle, nothing to send, the probe the
same as the last it heard: :meth:`~ionotrail.terminal.link.terminal.Link.indifferent_to`),
the probes up to the loop's next event are not simulated one by one: their
outcomes are reckoned in one numpy pass and handed over as a count
(:meth:`~ionotrail.terminal.link.terminal.Link.heard_unchanged`).

Every random draw is keyed (:mod:`~ionotrail.harness.channel.draws`): frame n
of a direction, and probe k of a probing epoch, draw from their own counter,
so a probe reckoned in bulk draws exactly what it would have drawn alone,
and skipping work never shifts a later draw.
"""

from __future__ import annotations

import asyncio
import dataclasses
import math
from collections.abc import Callable, Sequence
from typing import Protocol

import numpy as np
from ionotrail.harness.channel import draws
from ionotrail.harness.channel.model import Channel
from ionotrail.terminal.link.terminal import Arrival
from ionotrail.terminal.ports import Listener, Port
from ionotrail.terminal.wire import IDLE_PROBE_BYTES

DIRECTION_OF = {"terminal": "up", "master": "down"}
SHORTEST_PROBE_BYTES = IDLE_PROBE_BYTES  # a probe carrying no poll, acknowledgement or command
AIR_STREAM = 0x41495230  # "AIR0": the air's draws, apart from the trails'
FRAME_DRAW, FLIP_DRAW, PROBE_DRAW = 1, 2, 3
RECKON_SPAN_S = 300.0
"""Probes reckoned together span at most this long (the channel keeps trails
RETAIN_S = 600 s behind the latest time asked about)."""
SCALAR_BATCH = 8
"""Up to this many probes, a bulk reckoning asks the channel one probe at a time."""
EPOCH_SHIFT = 40
"""Probe k of probing epoch e draws counter (e << 40) + k: 2^40 probes an epoch
is 3,500 years at 0.1 s."""


class IdleTerminal(Protocol):
    """What the air asks of the terminal's link to skip probes it would ignore."""

    def indifferent_to(self, raw: bytes) -> bool: ...

    def heard_unchanged(self, raw: bytes, times: Sequence[float], snr_db: Callable[[int], float]) -> None: ...


@dataclasses.dataclass
class AirCounters:
    frames_sent: dict[str, int] = dataclasses.field(default_factory=lambda: {"up": 0, "down": 0})
    frames_delivered: dict[str, int] = dataclasses.field(default_factory=lambda: {"up": 0, "down": 0})
    frames_corrupted: dict[str, int] = dataclasses.field(default_factory=lambda: {"up": 0, "down": 0})
    probes_emitted_in_openings: int = 0
    probes_delivered: int = 0
    probes_unheard: int = 0  # intact but the terminal was deaf (receiver off or transmitting half duplex)
    probes_filtered: int = 0  # intact but removed by a fault hook
    probes_reckoned: int = 0  # of those emitted in openings, reckoned in bulk rather than one by one
    airtime_s: dict[str, float] = dataclasses.field(default_factory=lambda: {"up": 0.0, "down": 0.0})
    wasted_airtime_s: dict[str, float] = dataclasses.field(default_factory=lambda: {"up": 0.0, "down": 0.0})
    """Airtime of frames that did not arrive intact at a listening receiver."""


class Air:
    """One master and one terminal joined by a simulated channel.

    ``origin`` is the loop time that is channel time zero (the first port
    attached sets it when None).  ``half_duplex`` makes the terminal deaf
    while it transmits.  Frame outcomes are drawn from their own generator,
    seeded by ``seed``, so they never disturb the trail draws.
    ``oscillator_ppm`` is the offset between the two stations' oscillators:
    a receiver measures it (at its carrier) plus the carrying trail's Doppler,
    which the channel gives without it.  ``idle_terminal``, when given, lets
    the probe stream skip probes the terminal would ignore (module docstring).
    """

    def __init__(self, channel: Channel, *, seed: int, half_duplex: bool = False, origin: float | None = None, oscillator_ppm: float = 0.0) -> None:
        self.channel = channel
        self._frame_key = {d: draws.stream_key(seed, AIR_STREAM, FRAME_DRAW, i) for i, d in enumerate(("up", "down"))}
        self._flip_key = {d: draws.stream_key(seed, AIR_STREAM, FLIP_DRAW, i) for i, d in enumerate(("up", "down"))}
        self._probe_key = draws.stream_key(seed, AIR_STREAM, PROBE_DRAW)
        self._frame_serial = {"up": 0, "down": 0}
        self._probe_epoch_serial = -1
        self.idle_terminal: IdleTerminal | None = None
        self.half_duplex = half_duplex
        self.origin = origin
        self.bit_rate = {d: channel.params[d].bit_rate for d in ("up", "down")}
        self.threshold = {d: channel.params[d].ebn0_threshold for d in ("up", "down")}
        self.offset_hz = {d: oscillator_ppm * 1e-6 * channel.params[d].mhz * 1e6 for d in ("up", "down")}
        self.counters = AirCounters()
        self.used_trails: set[int] = set()
        self.on_uplink: Callable[[float, int, bool, float], None] | None = None
        """Observer of every uplink frame: (start time, bytes, arrived intact, Eb/N0 dB)."""
        self.on_arrival: Callable[[str, Arrival], None] | None = None
        """Observer of every frame handed to a station: (receiving role, the arrival)."""
        self.probe_filter: Callable[[float, bytes], bool] | None = None
        """Fault hook: a probe that arrived intact reaches the terminal only if
        this returns True for (arrival time, frame); None passes every probe."""
        self._running: asyncio.AbstractEventLoop | None = None
        self.master = SimulatedPort(self, "master")
        self.terminal = SimulatedPort(self, "terminal")

    # --- clocks ----------------------------------------------------------------------

    def _loop(self) -> asyncio.AbstractEventLoop:
        loop = self._running
        if loop is None:
            loop = self._running = asyncio.get_running_loop()
            if self.origin is None:
                self.origin = loop.time()
        return loop

    def now(self) -> float:
        """Channel time: seconds since the origin."""
        return self._loop().time() - self.origin  # type: ignore[operator]

    # --- transmissions ---------------------------------------------------------------

    def transmit(self, sender: SimulatedPort, frame: bytes) -> None:
        direction = DIRECTION_OF[sender.role]
        loop = self._loop()
        start = max(self.now(), sender.busy_until)
        bits = 8 * len(frame)
        end = start + bits / self.bit_rate[direction]
        sender.busy_until = end
        self.counters.frames_sent[direction] += 1
        self.counters.airtime_s[direction] += end - start
        serial = self._frame_serial[direction]
        self._frame_serial[direction] = serial + 1
        outlook = self.channel.outlook(direction, start, bits)
        carrier = outlook.carrier
        snr_db = _db(carrier)
        intact = draws.uniform(self._frame_key[direction], serial) < outlook.p_success
        if self.on_uplink is not None and direction == "up":
            self.on_uplink(start, len(frame), intact, snr_db)
        if intact:
            if direction == "up" and carrier is not None:
                self.used_trails.add(carrier[0])
            delivered = frame
        elif outlook.synchronised:
            bit = draws.below(self._flip_key[direction], serial, bits)
            damaged = bytearray(frame)
            damaged[bit // 8] ^= 0x80 >> (bit % 8)
            delivered = bytes(damaged)
            self.counters.frames_corrupted[direction] += 1
        else:
            self.counters.wasted_airtime_s[direction] += end - start
            return
        receiver = self.terminal if sender is self.master else self.master
        arrival = Arrival(delivered, self.origin + end, snr_db, self._offset(direction, carrier))  # type: ignore[operator]
        loop.call_at(arrival.time, self._arrive, receiver, arrival, start, direction, intact)

    def _arrive(self, receiver: SimulatedPort, arrival: Arrival, start: float, direction: str, intact: bool) -> None:
        heard = receiver.hears(start)
        if not (heard and intact):
            self.counters.wasted_airtime_s[direction] += 8 * len(arrival.frame) / self.bit_rate[direction]
        if not heard:
            return
        if intact:
            self.counters.frames_delivered[direction] += 1
        receiver.deliver(arrival)

    def _offset(self, direction: str, carrier: tuple[int, float] | None) -> float:
        """Frequency offset the receiver measures: oscillators plus the carrying trail's Doppler."""
        doppler = self.channel.doppler_of(direction, carrier[0]) if carrier else 0.0
        return self.offset_hz[direction] + doppler

    # --- the probe stream ------------------------------------------------------------

    def probing_changed(self) -> None:
        port = self.master
        if port.probe_handle is not None:
            port.probe_handle.cancel()
            port.probe_handle = None
        if port.probe_frame is not None:
            port.probe_epoch = self.now()
            port.probe_count = 0
            self._probe_epoch_serial += 1
            self._schedule_probe()

    def _next_probe(self) -> tuple[float, float, float] | None:
        """(emission, end, end of its opening) of the next probe emitted inside
        an opening, from probe number ``probe_count`` on, or None."""
        port = self.master
        frame = port.probe_frame
        assert frame is not None
        bits = 8 * SHORTEST_PROBE_BYTES  # probes are simulated wherever even the shortest could arrive
        interval = port.probe_interval
        while True:
            emit = port.probe_epoch + port.probe_count * interval
            window = self.channel.next_audible("down", bits, emit)
            if window is None:
                return None  # no opening left: the stream goes on unheard
            start, end = window
            if emit < start:
                port.probe_count = math.ceil((start - port.probe_epoch) / interval)
                emit = port.probe_epoch + port.probe_count * interval
                if emit >= end:  # the opening fell between two probes
                    continue
            return emit, emit + 8 * len(frame) / self.bit_rate["down"], end

    def _schedule_probe(self) -> None:
        """Wake the loop at the end of the next probe emitted inside an opening."""
        nxt = self._next_probe()
        if nxt is not None:
            self.master.probe_handle = self._loop().call_at(self.origin + nxt[1], self._probe_arrives, nxt[0], nxt[1])  # type: ignore[operator]

    def _probe_arrives(self, emit: float, end: float) -> None:
        """A probe's last bit has arrived.  While nothing else is due before the
        next probe, a virtual-time loop lets this run on to it directly; while
        the terminal is indifferent, every probe up to the loop's next event is
        reckoned in bulk."""
        port = self.master
        port.probe_handle = None
        loop = self._loop()
        advance = getattr(loop, "advance_if_idle", None)
        quiet_until = getattr(loop, "quiet_until", None)
        while True:
            quiet = quiet_until() - self.origin if quiet_until is not None else -math.inf  # type: ignore[operator]
            if quiet > end and self._may_reckon():  # something else is due first: this probe alone
                self._reckon(quiet)
            else:
                self._one_probe(emit, end)
                port.probe_count += 1
            if port.probe_frame is None or port.probe_handle is not None:
                return  # the stream was stopped or restarted meanwhile
            nxt = self._next_probe()
            if nxt is None:
                return
            emit, end, _ = nxt
            if advance is None or not advance(self.origin + end):  # type: ignore[operator]
                port.probe_handle = loop.call_at(self.origin + end, self._probe_arrives, emit, end)  # type: ignore[operator]
                return

    def _may_reckon(self) -> bool:
        """Probes may be reckoned in bulk up to the loop's next event: the
        terminal's receiver is off (it hears none of them; it can only come
        on at an event), or the terminal is indifferent to them."""
        frame = self.master.probe_frame
        terminal = self.terminal
        return (
            self.idle_terminal is not None
            and self.probe_filter is None
            and self.on_arrival is None  # an observer of every arrival is owed every probe
            and frame is not None
            and (not terminal.listening or terminal.closed or self.idle_terminal.indifferent_to(frame))
        )

    def _probe_counter(self, k: int) -> int:
        return (self._probe_epoch_serial << EPOCH_SHIFT) + k

    def _one_probe(self, emit: float, end: float) -> None:
        port = self.master
        frame = port.probe_frame
        assert frame is not None
        self.counters.probes_emitted_in_openings += 1
        bits = 8 * len(frame)
        outlook = self.channel.outlook("down", emit, bits)
        if draws.uniform(self._probe_key, self._probe_counter(port.probe_count)) < outlook.p_success:
            if self.probe_filter is not None and not self.probe_filter(end, frame):
                self.counters.probes_filtered += 1
            elif self.terminal.hears(emit):
                carrier = outlook.carrier
                self.counters.probes_delivered += 1
                self.terminal.deliver(Arrival(frame, self.origin + end, _db(carrier), self._offset("down", carrier)))  # type: ignore[operator]
            else:
                self.counters.probes_unheard += 1

    def _reckon(self, until: float) -> None:
        """Every probe from number ``probe_count`` whose last bit arrives before
        ``until`` (channel time), reckoned in bulk: drawn from the same keyed
        counters and the same success model as one by one, counted, and handed
        to the terminal together (the Eb/N0 of each only if it asks, from the
        same lookup as one by one).  At least the current probe is reckoned.
        Probes are gathered over the openings of the stretch and reckoned a
        few minutes' worth at a time (the channel holds that much behind the
        latest time asked about)."""
        port = self.master
        frame = port.probe_frame
        assert frame is not None and self.idle_terminal is not None
        bits = 8 * len(frame)
        airtime = bits / self.bit_rate["down"]
        heard: list[float] = []  # emission times of the probes the terminal hears
        pending: list[np.ndarray] = []  # emission times gathered, not yet reckoned
        pending_first = 0  # the probe number of the first of them
        first = True
        while True:
            nxt = self._next_probe()
            if nxt is not None:
                emit, end, window_end = nxt
            if nxt is None or (end >= until and not first) or (pending and emit - pending[0][0] > RECKON_SPAN_S):
                if pending:
                    heard.extend(self._reckon_some(np.concatenate(pending), pending_first, bits))
                    pending = []
                if nxt is None or (end >= until and not first):
                    break
            first = False
            k0 = port.probe_count
            if not pending:
                pending_first = k0
            # Probes of this opening: emitted before it closes, arriving before ``until``.
            last_emit = min(window_end, until - airtime)
            count = max(1, math.ceil((last_emit - port.probe_epoch) / port.probe_interval) - k0)
            pending.append(port.probe_epoch + np.arange(k0, k0 + count) * port.probe_interval)
            port.probe_count = k0 + count
        if heard:
            origin = self.origin
            assert origin is not None

            def snr_db(i: int) -> float:
                return _db(self.channel.frame_carrier("down", heard[i], bits))

            self.idle_terminal.heard_unchanged(frame, [origin + t + airtime for t in heard], snr_db)

    def _reckon_some(self, emits: np.ndarray, k_first: int, bits: int) -> list[float]:
        """Reckon probes emitted at ``emits`` (probe numbers from ``k_first`` on,
        in order, gaps between openings allowed); the emission times of those heard."""
        port = self.master
        ks = np.rint((emits - port.probe_epoch) / port.probe_interval).astype(np.int64)  # each probe's own number
        count = len(emits)
        if count <= SCALAR_BATCH:  # numpy's per-call cost outweighs a few scalar lookups
            key = self._probe_key
            intact = np.array([draws.uniform(key, self._probe_counter(int(k))) < self.channel.success_probability("down", t, bits)
                               for k, t in zip(ks.tolist(), emits.tolist(), strict=True)], dtype=bool)  # fmt: skip
        else:
            p = self.channel.success_probabilities("down", emits, bits)
            u = draws.uniforms_at(self._probe_key, self._probe_counter(0) + ks)
            intact = u < p
        if not (self.terminal.listening and not self.terminal.closed):
            got = np.zeros(count, dtype=bool)
        elif self.half_duplex:
            got = intact & ~(self.terminal.busy_until > emits)
        else:
            got = intact
        n_heard = int(np.count_nonzero(got))
        self.counters.probes_emitted_in_openings += count
        self.counters.probes_reckoned += count
        self.counters.probes_delivered += n_heard
        self.counters.probes_unheard += int(np.count_nonzero(intact)) - n_heard
        return emits[got].tolist()


def _db(carrier: tuple[int, float] | None) -> float:
    """The Eb/N0 a receiver reports for a frame, dB (-inf when no trail carried it)."""
    return 10 * math.log10(carrier[1]) if carrier else -math.inf


class SimulatedPort(Port):
    """One station's modem on the simulated air."""

    def __init__(self, air: Air, role: str) -> None:
        self.air = air
        self.role = role
        self.listener: Listener | None = None
        self.listening = False
        self.busy_until = -math.inf
        self.probe_frame: bytes | None = None
        self.probe_interval = 0.0
        self.probe_epoch = 0.0
        self.probe_count = 0
        self.probe_handle: asyncio.TimerHandle | None = None
        self.closed = False

    def attach(self, listener: Listener) -> None:
        self.air._loop()
        self.listener = listener

    def send(self, frame: bytes) -> None:
        if not self.closed:
            self.air.transmit(self, frame)

    def start_listening(self) -> None:
        self.listening = True

    def stop_listening(self) -> None:
        self.listening = False

    def start_probing(self, frame: bytes, interval: float) -> None:
        if self.role != "master":
            raise ValueError("only the master's port probes in this simulation")
        if not interval > 0:
            raise ValueError(f"probe interval must be positive, not {interval!r}")
        restart = self.probe_frame is None or interval != self.probe_interval
        self.probe_frame, self.probe_interval = frame, interval
        if restart:
            self.air.probing_changed()

    def stop_probing(self) -> None:
        self.probe_frame = None
        self.air.probing_changed()

    def hears(self, start: float) -> bool:
        """Is the receiver on, and (half duplex) not transmitting, for a frame from ``start``?"""
        if not self.listening or self.closed:
            return False
        return not (self.air.half_duplex and self.role == "terminal" and self.busy_until > start)

    def deliver(self, arrival: Arrival) -> None:
        if self.listener is not None and not self.closed:
            if self.air.on_arrival is not None:
                self.air.on_arrival(self.role, arrival)
            self.listener(arrival)

    async def close(self) -> None:
        self.closed = True
        if self.role == "master":
            self.stop_probing()
