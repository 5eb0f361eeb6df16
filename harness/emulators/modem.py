"""Two emulated radio modems joined by the channel model: what ``ionotrail emulate`` runs.

:class:`ModemEmulator` owns a :class:`~ionotrail.harness.channel.model.Channel`
and two :class:`EmulatedModem` stations, the terminal's and the master's.  Each
station talks to its host over a :class:`~ionotrail.harness.emulators.lines.Line`
(a pseudo-terminal, a loopback TCP listener or an existing serial device) in a
dialect of the host-modem interface (docs/modem.md), and behaves as a radio
modem does:

* ``Transmit`` puts the frame on the air after any frame already there; the
  host hears ``Transmitted(host_id, ok, airtime)`` when its last bit is sent.
  The other station receives it (``Received`` with its own clock time, the
  SNR and frequency offset it measured) only if the channel model says it
  survived: the frame-success probability over the SNR trajectory it meets,
  drawn from a generator keyed by seed, station and frame count, exactly as
  :mod:`ionotrail.harness.emulators.air` does for one frame.  A frame that
  fails after the receiver synchronised arrives with one bit flipped, so the
  host sees a CRC failure; one sent into a closed path is not heard.
* ``ProbeStart`` starts a probe stream the modem runs itself; only probes
  that arrive are delivered, and the loop is woken only for emissions inside
  an audible window of the channel (silence costs nothing).
* ``Listen`` gates delivery; ``Configure`` is stored and answered with a
  ``Status`` (a mismatch with the scenario is reported as a warning line);
  ``StatusQuery`` is answered with a plausible seeded ``Status``; unknown or
  malformed records are counted and answered with ``ErrorAnswer`` where the
  dialect can carry one; an ``ErrorAnswer`` from the host is counted.

The modems never look inside the air frames they carry: any air protocol passes.

Time.  Emulated time runs ``time_scale`` times faster than the wall clock:
channel time = ``start_s`` + ``time_scale`` x (wall seconds since start).
Airtimes, the probe cadence, fault durations and the fault schedule are on
that clock.  Each modem's own clock (the time stamped on Received, Status and
Reset) is a crystal on its board: it counts wall seconds since its last
power-on, with a seeded drift of a few ppm, and restarts at a reset; so a
host's clock estimate (which bounds the drift it accepts) holds at any scale.

Simplifications: a probe does not occupy the transmitter (frames and probes
may overlap, as in the air simulation); the receiver of the other station is
the only one on the channel; the configured frequencies, bit rate and power
do not change the channel, which is the scenario's.
"""

from __future__ import annotations

import asyncio
import bisect
import collections
import dataclasses
import math
import sys
from collections.abc import Callable, Mapping
from typing import Any, ClassVar, Self

import numpy as np
from ionotrail.harness.channel.model import Channel
from ionotrail.harness.channel.scenario import Scenario, Station
from ionotrail.harness.emulators.lines import Line
from ionotrail.terminal.errors import UsageError
from ionotrail.terminal.modem import records as rec
from ionotrail.terminal.modem.dialects import ANSWER_CODES, Dialect, LineError, Side

ROLES = ("terminal", "master")
DIRECTION_OF = {"terminal": "up", "master": "down"}

TX_QUEUE_MAX = 16
"""Frames a modem holds for the air (the one on the air included); a Transmit
beyond that is answered at once with ``Transmitted(ok=False)``: a small
modem's buffer (common practice, no source)."""
CLOCK_DRIFT_PPM = 20.0
"""Bound of each modem clock's seeded drift: a plain crystal (common practice, no source)."""
PROBE_CATCH_UP = 256
"""Probes handled in one wake-up when the loop runs behind emulated time."""
REFLECTED_SHARE = 0.017
"""Reflected power as a share of forward power: a VSWR of 1.3, a good antenna (common practice, no source)."""
REPLUG_RETRY_S = 1.0
"""Wall seconds between attempts to reopen a serial device that is not back yet."""

# Streams of the seeded generators, one per kind of draw, so that each replays alone.
_FRAME, _PROBE, _STATUS, _NOISE, _FAULTS, _STATION = range(1, 7)

@dataclasses.dataclass
class StationCounters:
    """What one station did since the emulator started (frames: those it transmitted)."""

    frames_carried: int = 0  # Transmit requests put on the air
    frames_refused: int = 0  # answered ok=False: the transmit queue was full
    frames_delivered: int = 0  # arrived intact at the other station's host
    frames_corrupted: int = 0  # arrived with a bit flipped
    frames_lost: int = 0  # never arrived: path closed, receiver deaf, stalled or unplugged, frame cut by a reset
    probe_streams: int = 0
    probes_in_openings: int = 0  # probes emitted inside an audible window (the others cannot arrive)
    probes_delivered: int = 0
    records_in: int = 0
    records_out: int = 0
    errors: int = 0  # records refused (each reason below) or out of place
    errors_by_reason: dict[str, int] = dataclasses.field(default_factory=dict)
    error_answers: int = 0  # sent
    error_answers_received: int = 0
    bytes_ignored: int = 0  # received while stalled
    resets: int = 0
    unplugs: int = 0
    stalls: int = 0
    configure_mismatches: int = 0


class EmulatedModem:
    """One station's radio modem: its host line, its dialect, its state."""

    def __init__(self, emulator: ModemEmulator, role: str, line: Line, dialect: Dialect) -> None:
        if role not in ROLES:
            raise ValueError(f"role must be one of {', '.join(ROLES)}, not {role!r}")
        self.em = emulator
        self.role = role
        self.index = ROLES.index(role)
        self.direction = DIRECTION_OF[role]
        self.line = line
        self.dialect = dialect
        self.station: Station = getattr(emulator.scenario, role)
        self.counters = StationCounters()
        rng = np.random.default_rng([emulator.seed, self.index, _STATION])
        self.clock_drift = float(rng.uniform(-CLOCK_DRIFT_PPM, CLOCK_DRIFT_PPM)) * 1e-6
        self.base_temperature_c = float(rng.uniform(15.0, 35.0))
        self.plugged = False
        self.stalled_until = -math.inf
        self.late_s = 0.0
        self.late_until = -math.inf
        self.stream = dialect.stream(Side.MODEM)
        self.listening = True
        self.configuration: rec.Configure | None = None
        self.booted_at = 0.0
        self.busy_until = -math.inf
        self._on_air: collections.deque[float] = collections.deque()  # end times of frames queued or on the air
        self._answers: dict[int, asyncio.TimerHandle] = {}
        self._arrivals: dict[int, asyncio.TimerHandle] = {}
        self._tokens = 0
        self.probe_frame: bytes | None = None
        self.probe_interval = 0.0
        self.probe_epoch = 0.0
        self.probe_count = 0
        self.probe_stream = 0
        self.probe_handle: asyncio.TimerHandle | None = None
        self._noise_count = 0
        self._status_count = 0

    # --- state -----------------------------------------------------------------------

    def power_on(self) -> None:
        """Back to the power-on state: listening, not probing, unconfigured, nothing
        queued (frames still on the air are cut), the clock restarted."""
        now = self.em.now()
        self.stream = self.dialect.stream(Side.MODEM)
        self.listening = True
        self.configuration = None
        self._stop_probes()
        for handle in self._answers.values():
            handle.cancel()
        self._answers.clear()
        for handle in self._arrivals.values():
            handle.cancel()
        self.counters.frames_lost += len(self._arrivals)
        self._arrivals.clear()
        self._on_air.clear()
        self.busy_until = now
        self.booted_at = self.em.wall_now()
        self.stalled_until = -math.inf
        self.late_until = -math.inf

    def modem_time(self) -> float:
        """This modem's clock: wall seconds since power-on, with its drift."""
        return max(0.0, (self.em.wall_now() - self.booted_at) * (1.0 + self.clock_drift))

    def stalled(self) -> bool:
        return self.em.now() < self.stalled_until

    def hears(self, start: float) -> bool:
        """Would this station's host get a frame whose first bit reached it at ``start``?"""
        if not self.listening or not self.plugged or self.stalled():
            return False
        return not (self.em.half_duplex and self.role == "terminal" and self.busy_until > start)

    def _token(self) -> int:
        self._tokens += 1
        return self._tokens

    # --- the host line ---------------------------------------------------------------

    def on_data(self, data: bytes) -> None:
        """Bytes from the host."""
        if not self.plugged:
            return
        if self.stalled():
            self.counters.bytes_ignored += len(data)
            return
        for item in self.stream.feed(data):
            if isinstance(item, LineError):
                self._refused(item.reason, item.record_type, item.answer)
            else:
                self._request(item)

    def send(self, record: Any) -> bool:
        """Write one record to the host, if the line is up, the modem answering and
        the dialect able to carry it."""
        if not self.plugged or self.stalled():
            return False
        if not self.dialect.carries(rec.record_type_of(record)):
            return False
        try:
            data = self.dialect.encode(record)
        except UsageError as exc:  # a value this dialect cannot represent
            self.em.say(f"warning: {self.role} modem could not encode {type(record).__name__}: {exc}")
            return False
        self.line.write(data)
        self.counters.records_out += 1
        return True

    def _refused(self, reason: str, record_type: int, answer: bool) -> None:
        self.counters.errors += 1
        self.counters.errors_by_reason[reason] = self.counters.errors_by_reason.get(reason, 0) + 1
        if answer and self.send(rec.ErrorAnswer(ANSWER_CODES.get(reason, rec.ErrorCode.MALFORMED), record_type & 0xFF)):
            self.counters.error_answers += 1

    def _request(self, record: Any) -> None:
        self.counters.records_in += 1
        handler = self._HANDLERS.get(type(record))
        if handler is None:  # a modem-to-host record sent by the host
            self._refused("wrong_direction", int(rec.record_type_of(record)), True)
            return
        handler(self, record)

    def _transmit(self, request: rec.Transmit) -> None:
        now = self.em.now()
        while self._on_air and self._on_air[0] <= now:
            self._on_air.popleft()
        if len(self._on_air) >= TX_QUEUE_MAX:
            self.counters.frames_refused += 1
            self.send(rec.Transmitted(request.host_id, False, 0.0))
            return
        frame = bytes(request.frame)
        start = max(now, self.busy_until)
        airtime = 8 * len(frame) / self.em.bit_rate
        end = start + airtime
        self.busy_until = end
        self._on_air.append(end)
        self.counters.frames_carried += 1
        self.em.carry(self, frame, start, end)
        delay = self.late_s if now < self.late_until else 0.0
        token = self._token()
        self._answers[token] = self.em.at(end + delay, self._transmitted, token, request.host_id, airtime)

    def _transmitted(self, token: int, host_id: int, airtime: float) -> None:
        self._answers.pop(token, None)
        self.send(rec.Transmitted(host_id, True, airtime))

    def _probe_start(self, request: rec.ProbeStart) -> None:
        restart = self.probe_frame is None or request.interval_s != self.probe_interval
        self.probe_frame, self.probe_interval = bytes(request.frame), float(request.interval_s)
        if restart:
            if self.probe_handle is not None:
                self.probe_handle.cancel()
                self.probe_handle = None
            self.probe_epoch = self.em.now()
            self.probe_count = 0
            self.probe_stream += 1
            self.counters.probe_streams += 1
            self._schedule_probe()

    def _probe_stop(self, _request: rec.ProbeStop) -> None:
        self._stop_probes()

    def _listen(self, request: rec.Listen) -> None:
        self.listening = bool(request.on)

    def _configure(self, request: rec.Configure) -> None:
        self.configuration = request
        s = self.em.scenario
        tx_mhz, rx_mhz = (s.up_mhz, s.down_mhz) if self.role == "terminal" else (s.down_mhz, s.up_mhz)
        wanted = {
            "tx": (request.tx_hz / 1e6, tx_mhz, "MHz"),
            "rx": (request.rx_hz / 1e6, rx_mhz, "MHz"),
            "bit rate": (float(request.bit_rate), s.bit_rate, "bit/s"),
            "power": (float(request.power_w), self.station.tx_power_w, "W"),
        }
        differ = [
            f"{name} {got:g} {unit} (scenario {want:g} {unit})"
            for name, (got, want, unit) in wanted.items()
            if not math.isclose(got, want, rel_tol=1e-6, abs_tol=0.05 if unit == "W" else 1e-6)
        ]
        if differ:
            self.counters.configure_mismatches += 1
            self.em.say(f"warning: {self.role} modem configured {', '.join(differ)}; the channel stays the scenario's")
        self._status_query(rec.StatusQuery())  # a configure is answered with the modem's status

    def _error_answer(self, request: rec.ErrorAnswer) -> None:
        self.counters.error_answers_received += 1  # the host refused something we sent: counted, not answered

    def _status_query(self, _request: rec.StatusQuery) -> None:
        self._status_count += 1
        rng = np.random.default_rng([self.em.seed, self.index, _STATUS, self._status_count])
        now = self.em.now()
        transmitting = self.busy_until > now or self.probe_frame is not None
        power = float(self.configuration.power_w) if self.configuration is not None else self.station.tx_power_w
        temperature = self.base_temperature_c + (8.0 if transmitting else 0.0) + float(rng.normal(0.0, 0.3))
        supply = 13.6 - (0.5 if transmitting else 0.0) + float(rng.normal(0.0, 0.05))
        reflected = power * REFLECTED_SHARE * (1.0 + float(rng.normal(0.0, 0.1))) if transmitting else 0.0
        self.send(
            rec.Status(
                self.modem_time(),
                round(temperature, 1),
                round(supply, 2),
                rec.PaState.ON if transmitting else rec.PaState.OFF,
                round(max(0.0, reflected), 1),
            )
        )

    _HANDLERS: ClassVar[dict[type, Callable[[EmulatedModem, Any], None]]] = {
        rec.Transmit: _transmit,
        rec.ProbeStart: _probe_start,
        rec.ProbeStop: _probe_stop,
        rec.Listen: _listen,
        rec.Configure: _configure,
        rec.StatusQuery: _status_query,
        rec.ErrorAnswer: _error_answer,
    }

    # --- the probe stream ------------------------------------------------------------

    def _stop_probes(self) -> None:
        self.probe_frame = None
        if self.probe_handle is not None:
            self.probe_handle.cancel()
            self.probe_handle = None

    def _next_probe(self) -> tuple[float, float] | None:
        """(emission, end) of the next probe emitted inside an audible window, or None."""
        frame = self.probe_frame
        assert frame is not None
        bits = 8 * len(frame)
        starts, ends = self.em.windows(self.direction, bits)
        interval = self.probe_interval
        while True:
            emit = self.probe_epoch + self.probe_count * interval
            w = bisect.bisect_right(ends, emit)
            if w >= len(starts):
                return None  # no window left in the scenario's period
            if emit < starts[w]:
                self.probe_count = math.ceil((starts[w] - self.probe_epoch) / interval)
                emit = self.probe_epoch + self.probe_count * interval
                if emit >= ends[w]:  # the window fell between two probes
                    continue
            return emit, emit + bits / self.em.bit_rate

    def _schedule_probe(self) -> None:
        nxt = self._next_probe()
        if nxt is not None:
            self.probe_handle = self.em.at(nxt[1], self._probes_due, *nxt)

    def _probes_due(self, emit: float, end: float) -> None:
        self.probe_handle = None
        for _ in range(PROBE_CATCH_UP):
            self._one_probe(emit, end)
            self.probe_count += 1
            if self.probe_frame is None or self.probe_handle is not None:
                return  # stopped or restarted meanwhile
            nxt = self._next_probe()
            if nxt is None:
                return
            emit, end = nxt
            if not self.em.overdue(end):
                break
        self.probe_handle = self.em.at(end, self._probes_due, emit, end)

    def _one_probe(self, emit: float, end: float) -> None:
        frame = self.probe_frame
        assert frame is not None
        self.counters.probes_in_openings += 1
        bits = 8 * len(frame)
        rng = np.random.default_rng([self.em.seed, self.index, _PROBE, self.probe_stream, self.probe_count])
        if rng.random() < self.em.channel.success_probability(self.direction, emit, bits):
            receiver = self.em.other(self)
            if receiver.hears(emit):
                carrier = self.em.channel.frame_carrier(self.direction, emit, bits)
                if receiver.send(rec.Received(receiver.modem_time(), _snr(carrier), self.em.offset_hz(self.direction, carrier), frame)):
                    self.counters.probes_delivered += 1

    # --- faults ----------------------------------------------------------------------

    def reset(self, reason: rec.ResetReason) -> None:
        self.counters.resets += 1
        self.power_on()
        self.send(rec.Reset(self.modem_time(), reason))

    def unplug(self) -> None:
        self.counters.unplugs += 1
        self.power_on()
        self.plugged = False
        self.line.unplug()

    async def replug(self) -> None:
        while True:
            try:
                await self.line.replug()
                break
            except (OSError, ValueError) as exc:  # a device that is not back yet (SerialException is an OSError)
                self.em.say(f"{self.role} line {self.line.address} not back yet: {exc}")
                await asyncio.sleep(REPLUG_RETRY_S)
        self.plugged = True
        self.power_on()
        self.send(rec.Reset(self.modem_time(), rec.ResetReason.POWER_ON))

    def stall(self, seconds: float) -> None:
        self.counters.stalls += 1
        self.stalled_until = self.em.now() + seconds

    def late(self, seconds: float, lasting: float) -> None:
        self.late_s = seconds
        self.late_until = self.em.now() + lasting if seconds > 0 else -math.inf

    def noise(self, count: int, inbound: bool) -> None:
        self._noise_count += 1
        rng = np.random.default_rng([self.em.seed, self.index, _NOISE, self._noise_count])
        data = rng.integers(0, 256, count, dtype=np.uint8).tobytes()
        if inbound:
            self.on_data(data)
        elif self.plugged:
            self.line.write(data)

    def summary(self) -> str:
        c = self.counters
        reasons = ", ".join(f"{k} {v}" for k, v in sorted(c.errors_by_reason.items()))
        return (
            f"{self.role}: frames carried {c.frames_carried}, delivered {c.frames_delivered}, corrupted {c.frames_corrupted}, "
            f"lost {c.frames_lost}, refused {c.frames_refused}; probes delivered {c.probes_delivered}; "
            f"records in {c.records_in}, out {c.records_out}; errors {c.errors}{f' ({reasons})' if reasons else ''}; "
            f"resets {c.resets}, unplugs {c.unplugs}, stalls {c.stalls}; line bytes dropped {self.line.dropped_bytes}"
        )


def _snr(carrier: tuple[int, float] | None) -> float:
    """The SNR a modem reports for a frame: the carrying trail's Eb/N0 in dB (NaN when none)."""
    return 10 * math.log10(carrier[1]) if carrier and carrier[1] > 0 else math.nan


FAULT_HELP = """\
commands, one a line (seconds are emulated seconds):
  noise [terminal|master] N [in]    N random bytes on the line to the host (in: from the host); both lines without a role
  reset terminal|master             the modem resets: a Reset record; probing, listening and configuration cleared
  unplug terminal|master S          the line disappears for S seconds, then comes back powered on
  stall terminal|master S           the modem stops answering (and reading) for S seconds
  late terminal|master S [FOR]      Transmitted answers come S seconds late, for FOR seconds (default: until changed)
  status                            one summary line per station
  help                              this text"""

FAULT_KINDS = ("noise", "reset", "unplug", "stall", "late")


class ModemEmulator:
    """Two emulated modems, the terminal's and the master's, joined by ``channel``.

    ``lines`` and ``dialects`` map each role to its host line and dialect.
    ``say`` receives every line the emulator prints (faults as they happen,
    warnings).  ``faults_every``: mean emulated seconds between faults of a
    seeded schedule (None: faults only on command).
    """

    def __init__(
        self,
        channel: Channel,
        scenario: Scenario,
        lines: Mapping[str, Line],
        dialects: Mapping[str, Dialect],
        *,
        seed: int | None = None,
        time_scale: float = 1.0,
        start_s: float = 0.0,
        faults_every: float | None = None,
        say: Callable[[str], None] | None = None,
    ) -> None:
        if not time_scale > 0:
            raise ValueError(f"time scale must be positive, not {time_scale!r}")
        if faults_every is not None and not faults_every > 0:
            raise ValueError(f"fault interval must be positive, not {faults_every!r}")
        self.channel = channel
        self.scenario = scenario
        self.seed = scenario.seed if seed is None else seed
        self.time_scale = float(time_scale)
        self.start_s = float(start_s)
        self.faults_every = faults_every
        self._say = say if say is not None else _print
        self.bit_rate = scenario.bit_rate
        self.half_duplex = scenario.duplex == "half"
        self._offset = {d: scenario.oscillator_ppm * 1e-6 * channel.params[d].mhz * 1e6 for d in ("up", "down")}
        self._threshold = {d: channel.params[d].ebn0_threshold for d in ("up", "down")}
        self._windows: dict[tuple[str, int], tuple[list[float], list[float]]] = {}
        self.modems = {role: EmulatedModem(self, role, lines[role], dialects[role]) for role in ROLES}
        self.origin: float | None = None
        self._loop: asyncio.AbstractEventLoop | None = None
        self._tasks: set[asyncio.Task[None]] = set()
        self._fault_handle: asyncio.TimerHandle | None = None
        self._fault_rng = np.random.default_rng([self.seed, _FAULTS])
        self.faults = 0

    @property
    def terminal(self) -> EmulatedModem:
        return self.modems["terminal"]

    @property
    def master(self) -> EmulatedModem:
        return self.modems["master"]

    def other(self, modem: EmulatedModem) -> EmulatedModem:
        return self.master if modem is self.terminal else self.terminal

    # --- clocks ------------------------------------------------------------------------

    def now(self) -> float:
        """Emulated (channel) time, seconds from the scenario's start."""
        if self._loop is None or self.origin is None:
            return self.start_s
        return self.start_s + self.time_scale * (self._loop.time() - self.origin)

    def wall_now(self) -> float:
        """The loop's (wall) clock."""
        return self._loop.time() if self._loop is not None else 0.0

    def wall(self, t: float) -> float:
        """The loop time at which emulated time reaches ``t``."""
        assert self.origin is not None
        return self.origin + (t - self.start_s) / self.time_scale

    def at(self, t: float, callback: Callable[..., None], *args: Any) -> asyncio.TimerHandle:
        """Run ``callback(*args)`` when emulated time reaches ``t``."""
        assert self._loop is not None
        return self._loop.call_at(self.wall(t), callback, *args)

    def overdue(self, t: float) -> bool:
        """Has emulated time already passed ``t`` (the loop runs behind)?"""
        assert self._loop is not None
        return self.wall(t) <= self._loop.time()

    def stamp(self) -> str:
        return f"[{self.now():10.3f}]"

    def say(self, text: str) -> None:
        self._say(f"{self.stamp()} {text}")

    # --- the channel -------------------------------------------------------------------

    def windows(self, direction: str, bits: int) -> tuple[list[float], list[float]]:
        key = (direction, bits)
        if key not in self._windows:
            self._windows[key] = self.channel.audible_windows(direction, bits)
        return self._windows[key]

    def offset_hz(self, direction: str, carrier: tuple[int, float] | None) -> float:
        """Frequency offset a receiver measures: the oscillators' plus the carrying trail's Doppler."""
        doppler = self.channel.doppler_of(direction, carrier[0]) if carrier else 0.0
        return self._offset[direction] + doppler

    def carry(self, sender: EmulatedModem, frame: bytes, start: float, end: float) -> None:
        """Put ``frame`` on the air from ``sender`` over [start, end]; schedule its arrival if any."""
        direction = sender.direction
        bits = 8 * len(frame)
        rng = np.random.default_rng([self.seed, sender.index, _FRAME, sender.counters.frames_carried])
        intact = bool(rng.random() < self.channel.success_probability(direction, start, bits))
        if intact:
            delivered = frame
        elif self._synchronised(direction, start):
            bit = int(rng.integers(0, bits))
            damaged = bytearray(frame)
            damaged[bit // 8] ^= 0x80 >> (bit % 8)
            delivered = bytes(damaged)
        else:
            sender.counters.frames_lost += 1
            return
        carrier = self.channel.frame_carrier(direction, start, bits)
        token = sender._token()
        sender._arrivals[token] = self.at(end, self._arrive, sender, token, delivered, intact, start, carrier)

    def _arrive(self, sender: EmulatedModem, token: int, frame: bytes, intact: bool, start: float, carrier: tuple[int, float] | None) -> None:
        sender._arrivals.pop(token, None)
        receiver = self.other(sender)
        direction = sender.direction
        if receiver.hears(start) and receiver.send(
            rec.Received(receiver.modem_time(), _snr(carrier), self.offset_hz(direction, carrier), frame)
        ):
            if intact:
                sender.counters.frames_delivered += 1
            else:
                sender.counters.frames_corrupted += 1
        else:
            sender.counters.frames_lost += 1

    def _synchronised(self, direction: str, start: float) -> bool:
        """Was the path open at a frame's first bit, so the receiver caught it?"""
        strongest = self.channel.strongest(direction, start)
        return strongest is not None and strongest[1] >= self._threshold[direction]

    # --- running -------------------------------------------------------------------------

    async def start(self) -> None:
        """Open both lines (emulated time starts now) and the fault schedule."""
        self._loop = asyncio.get_running_loop()
        self.origin = self._loop.time()
        for modem in self.modems.values():
            await modem.line.open(modem.on_data)
            modem.plugged = True
            modem.power_on()
        if self.faults_every is not None:
            self._schedule_fault()

    async def close(self) -> None:
        if self._fault_handle is not None:
            self._fault_handle.cancel()
        for task in list(self._tasks):
            task.cancel()
        for modem in self.modems.values():
            modem.power_on()  # cancels every pending answer, arrival and probe
            modem.plugged = False
            await modem.line.close()

    async def __aenter__(self) -> Self:
        await self.start()
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self.close()

    @property
    def end_s(self) -> float:
        """Emulated time at which the scenario's period (and its trails) ends."""
        return self.scenario.duration_s

    async def run(self, duration_s: float | None = None, stop: asyncio.Event | None = None) -> str:
        """Start, :meth:`wait`, close; returns why it ended."""
        await self.start()
        try:
            return await self.wait(duration_s, stop)
        finally:
            await self.close()

    async def wait(self, duration_s: float | None = None, stop: asyncio.Event | None = None) -> str:
        """Until ``duration_s`` emulated seconds have passed since the start, ``stop``
        is set or the scenario's period ends; returns which."""
        assert self._loop is not None, "start() first"
        end = self.end_s if duration_s is None else min(self.end_s, self.start_s + duration_s)
        stop = stop if stop is not None else asyncio.Event()
        try:
            await asyncio.wait_for(stop.wait(), timeout=max(0.0, self.wall(end) - self._loop.time()))
        except TimeoutError:
            return "duration reached" if end < self.end_s else "the scenario's period ended"
        return "stopped"

    # --- faults ------------------------------------------------------------------------

    def command(self, text: str) -> str | None:
        """Carry out one command line (see FAULT_HELP); returns an error message, or None."""
        words = text.split()
        if not words:
            return None
        verb, args = words[0].lower(), words[1:]
        try:
            if verb == "help":
                self._say(FAULT_HELP)
            elif verb == "status":
                for modem in self.modems.values():
                    self._say(modem.summary())
            elif verb == "noise":
                self._noise(args)
            elif verb == "reset" and len(args) == 1:
                self.say(f"fault: reset {self._modem(args[0]).role}")
                self._modem(args[0]).reset(rec.ResetReason.WATCHDOG)
            elif verb in ("unplug", "stall") and len(args) == 2:
                modem, seconds = self._modem(args[0]), _seconds(args[1])
                self.say(f"fault: {verb} {modem.role} {seconds:g} s")
                if verb == "unplug":
                    self._unplug(modem, seconds)
                else:
                    modem.stall(seconds)
            elif verb == "late" and len(args) in (2, 3):
                modem, seconds = self._modem(args[0]), _seconds(args[1])
                lasting = _seconds(args[2]) if len(args) == 3 else math.inf
                self.say(f"fault: late {modem.role} {seconds:g} s" + (f" for {lasting:g} s" if len(args) == 3 else ""))
                modem.late(seconds, lasting)
            else:
                return f"not understood: {text.strip()!r} (type help)"
        except ValueError as exc:
            return str(exc)
        if verb in FAULT_KINDS:
            self.faults += 1
        return None

    def _modem(self, name: str) -> EmulatedModem:
        if name.lower() not in self.modems:
            raise ValueError(f"which station? {name!r} is not terminal or master")
        return self.modems[name.lower()]

    def _noise(self, args: list[str]) -> None:
        inbound = bool(args) and args[-1].lower() == "in"
        if inbound:
            args = args[:-1]
        if len(args) == 1:
            targets = list(self.modems.values())
        elif len(args) == 2:
            targets = [self._modem(args[0])]
        else:
            raise ValueError("noise [terminal|master] N [in]")
        try:
            count = int(args[-1])
        except ValueError:
            raise ValueError(f"noise: {args[-1]!r} is not a whole number of bytes") from None
        if not 0 < count <= 1_000_000:
            raise ValueError("noise: from 1 to 1000000 bytes")
        names = " and ".join(m.role for m in targets)
        self.say(f"fault: noise {names}: {count} bytes {'from' if inbound else 'to'} the host")
        for modem in targets:
            modem.noise(count, inbound)

    def _unplug(self, modem: EmulatedModem, seconds: float) -> None:
        if not modem.plugged:
            return
        modem.unplug()
        self.at(self.now() + seconds, self._spawn, modem)

    def _spawn(self, modem: EmulatedModem) -> None:
        task = asyncio.ensure_future(self._replug(modem))
        self._tasks.add(task)
        task.add_done_callback(self._tasks.discard)

    async def _replug(self, modem: EmulatedModem) -> None:
        await modem.replug()
        self.say(f"{modem.role} line back: {modem.line.address}")

    def _schedule_fault(self) -> None:
        assert self.faults_every is not None
        wait = float(self._fault_rng.exponential(self.faults_every))
        self._fault_handle = self.at(self.now() + wait, self._scheduled_fault)

    def _scheduled_fault(self) -> None:
        rng = self._fault_rng
        kind = FAULT_KINDS[int(rng.integers(0, len(FAULT_KINDS)))]
        role = ROLES[int(rng.integers(0, len(ROLES)))]
        if kind == "noise":
            text = f"noise {role} {int(rng.integers(1, 65))}"
        elif kind == "reset":
            text = f"reset {role}"
        elif kind == "unplug":
            text = f"unplug {role} {rng.uniform(1.0, 5.0):.1f}"
        elif kind == "stall":
            text = f"stall {role} {rng.uniform(0.5, 3.0):.1f}"
        else:
            text = f"late {role} {rng.uniform(0.2, 2.0):.1f} 30"
        self.command(text)
        self._schedule_fault()

    def summary(self) -> list[str]:
        return [modem.summary() for modem in self.modems.values()]


def _seconds(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise ValueError(f"{text!r} is not a number of seconds") from None
    if not (math.isfinite(value) and 0 <= value <= 86400 * 366):
        raise ValueError(f"{text!r}: seconds from 0 to a year")
    return value


def _print(text: str) -> None:
    print(text, flush=True)
    sys.stdout.flush()
