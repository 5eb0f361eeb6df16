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
reported.  A day with no trails costs no events at all.
"""

from __future__ import annotations

import asyncio
import bisect
import dataclasses
import math
from collections.abc import Callable

import numpy as np
from ionotrail.harness.channel.model import Channel
from ionotrail.terminal.link.terminal import Arrival
from ionotrail.terminal.ports import Listener, Port
from ionotrail.terminal.wire import IDLE_PROBE_BYTES

DIRECTION_OF = {"terminal": "up", "master": "down"}
SHORTEST_PROBE_BYTES = IDLE_PROBE_BYTES  # a probe carrying no poll, acknowledgement or command


@dataclasses.dataclass
class AirCounters:
    frames_sent: dict[str, int] = dataclasses.field(default_factory=lambda: {"up": 0, "down": 0})
    frames_delivered: dict[str, int] = dataclasses.field(default_factory=lambda: {"up": 0, "down": 0})
    frames_corrupted: dict[str, int] = dataclasses.field(default_factory=lambda: {"up": 0, "down": 0})
    probes_emitted_in_openings: int = 0
    probes_delivered: int = 0
    probes_unheard: int = 0  # intact but the terminal was deaf (receiver off or transmitting half duplex)
    probes_filtered: int = 0  # intact but removed by a fault hook


class Air:
    """One master and one terminal joined by a simulated channel.

    ``origin`` is the loop time that is channel time zero (the first port
    attached sets it when None).  ``half_duplex`` makes the terminal deaf
    while it transmits.  Frame outcomes are drawn from their own generator,
    seeded by ``seed``, so they never disturb the trail draws.
    ``oscillator_ppm`` is the offset between the two stations' oscillators:
    a receiver measures it (at its carrier) plus the carrying trail's Doppler,
    which the channel gives without it.
    """

    def __init__(self, channel: Channel, *, seed: int, half_duplex: bool = False, origin: float | None = None, oscillator_ppm: float = 0.0) -> None:
        self.channel = channel
        self.rng = np.random.default_rng([seed, 0x41495230])  # "AIR0": a stream of its own
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
        # Probes are simulated wherever even the shortest could still arrive (a
        # shortest probe outlives the BER threshold that defines "open" by a few tau).
        self._windows = channel.audible_windows("down", 8 * SHORTEST_PROBE_BYTES)

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
        carrier = self.channel.frame_carrier(direction, start, bits)
        snr_db = _db(carrier)
        p = self.channel.success_probability(direction, start, bits)
        intact = bool(self.rng.random() < p)
        if self.on_uplink is not None and direction == "up":
            self.on_uplink(start, len(frame), intact, snr_db)
        if intact:
            if direction == "up" and carrier is not None:
                self.used_trails.add(carrier[0])
            delivered = frame
        elif self._synchronised(direction, start):
            bit = int(self.rng.integers(0, bits))
            damaged = bytearray(frame)
            damaged[bit // 8] ^= 0x80 >> (bit % 8)
            delivered = bytes(damaged)
            self.counters.frames_corrupted[direction] += 1
        else:
            return
        receiver = self.terminal if sender is self.master else self.master
        arrival = Arrival(delivered, self.origin + end, snr_db, self._offset(direction, carrier))  # type: ignore[operator]
        loop.call_at(arrival.time, self._arrive, receiver, arrival, start, direction, intact)

    def _arrive(self, receiver: SimulatedPort, arrival: Arrival, start: float, direction: str, intact: bool) -> None:
        if not receiver.hears(start):
            return
        if intact:
            self.counters.frames_delivered[direction] += 1
        receiver.deliver(arrival)

    def _synchronised(self, direction: str, start: float) -> bool:
        """Was the path open at a frame's first bit, so the receiver caught it?"""
        strongest = self.channel.strongest(direction, start)
        return strongest is not None and strongest[1] >= self.threshold[direction]

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
            self._schedule_probe()

    def _next_probe(self) -> tuple[float, float] | None:
        """(emission, end) of the next probe emitted inside an opening, or None."""
        port = self.master
        starts, ends = self._windows
        interval = port.probe_interval
        while True:
            emit = port.probe_epoch + port.probe_count * interval
            w = bisect.bisect_right(ends, emit)
            if w >= len(starts):
                return None  # no opening left: the stream goes on unheard
            if emit < starts[w]:
                port.probe_count = math.ceil((starts[w] - port.probe_epoch) / interval)
                emit = port.probe_epoch + port.probe_count * interval
                if emit >= ends[w]:  # the opening fell between two probes
                    continue
            assert port.probe_frame is not None
            return emit, emit + 8 * len(port.probe_frame) / self.bit_rate["down"]

    def _schedule_probe(self) -> None:
        """Wake the loop at the end of the next probe emitted inside an opening."""
        nxt = self._next_probe()
        if nxt is not None:
            self.master.probe_handle = self._loop().call_at(self.origin + nxt[1], self._probe_arrives, *nxt)  # type: ignore[operator]

    def _probe_arrives(self, emit: float, end: float) -> None:
        """A probe's last bit has arrived.  While nothing else is due before the
        next probe, a virtual-time loop lets this run on to it directly."""
        port = self.master
        port.probe_handle = None
        loop = self._loop()
        advance = getattr(loop, "advance_if_idle", None)
        while True:
            self._one_probe(emit, end)
            port.probe_count += 1
            if port.probe_frame is None or port.probe_handle is not None:
                return  # the stream was stopped or restarted meanwhile
            nxt = self._next_probe()
            if nxt is None:
                return
            emit, end = nxt
            if advance is None or not advance(self.origin + end):  # type: ignore[operator]
                port.probe_handle = loop.call_at(self.origin + end, self._probe_arrives, emit, end)  # type: ignore[operator]
                return

    def _one_probe(self, emit: float, end: float) -> None:
        frame = self.master.probe_frame
        assert frame is not None
        self.counters.probes_emitted_in_openings += 1
        bits = 8 * len(frame)
        if self.rng.random() < self.channel.success_probability("down", emit, bits):
            if self.probe_filter is not None and not self.probe_filter(end, frame):
                self.counters.probes_filtered += 1
            elif self.terminal.hears(emit):
                carrier = self.channel.frame_carrier("down", emit, bits)
                self.counters.probes_delivered += 1
                self.terminal.deliver(Arrival(frame, self.origin + end, _db(carrier), self._offset("down", carrier)))  # type: ignore[operator]
            else:
                self.counters.probes_unheard += 1


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
