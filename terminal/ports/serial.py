"""A radio modem on a serial line: the :class:`Port` interface over pyserial.

The port speaks one :class:`~ionotrail.terminal.modem.dialects.Dialect` on the
line (ours, or KISS) and turns the service's calls into records: ``send`` is a
``Transmit`` with the next host id, probing and listening are ``ProbeStart`` /
``ProbeStop`` / ``Listen``, and a ``Configure`` given at construction is sent
whenever the line (re)opens.  What the dialect cannot carry is skipped, except
probing: on a line that cannot start a probe stream (KISS) the port keeps the
cadence itself and sends the probe frame as a ``Transmit`` every interval.

Received frames reach the listener as :class:`Arrival` on the event loop's
clock: the modem's timestamps go through a :class:`ModemClock`, and a frame
without one (KISS) is stamped with the time it was read.  Refused records are
counted by reason and, when the dialect carries it, answered with an
``ErrorAnswer``; nothing received ever raises out of the port.

A modem that goes away (USB unplug: EIO; a closed port or socket) is reopened
with bounded exponential backoff whose jitter comes from a generator seeded
at construction.  While the line is down ``send`` drops the frame and counts
it: the protocol above retransmits whatever was not acknowledged, so nothing
the service queued is lost or duplicated.  After a reopen, or a ``Reset``
record from the modem, the modem clock estimate restarts and the modem's
configuration, listening state and probe stream are sent again.

Ports open through ``serial.serial_for_url(url, do_not_open=True)`` and
pyserial-asyncio-fast, which watches the port's file descriptor from the loop
and opens and closes it in an executor: a device path, a pseudo-terminal or
``socket://host:port`` work.  A URL whose port has no file descriptor
(``rfc2217://host:port``, ``loop://``: pyserial serves those from a thread)
gets a :class:`_ThreadedTransport` instead: one thread reads and hands the
bytes to the loop, another writes; the loop never blocks on the port.
"""

from __future__ import annotations

import asyncio
import dataclasses
import io
import math
import queue
import random
import threading
import urllib.parse
from typing import Any

import serial  # type: ignore[import-untyped]
import serial_asyncio_fast
from ionotrail.terminal.errors import UsageError
from ionotrail.terminal.limits import (
    BACKOFF_INITIAL_S,
    BACKOFF_JITTER,
    BACKOFF_MAX_S,
    CLOSE_TIMEOUT_S,
    WRITE_BACKLOG_MAX_BYTES,
)
from ionotrail.terminal.link.terminal import Arrival
from ionotrail.terminal.modem.clock import ModemClock
from ionotrail.terminal.modem.dialects import ANSWER_CODES, Dialect, LineError, RecordStream, Side, error_answer
from ionotrail.terminal.modem.records import (
    Configure,
    ErrorAnswer,
    Listen,
    ProbeStart,
    ProbeStop,
    Received,
    Record,
    RecordType,
    Reset,
    Status,
    Transmit,
    Transmitted,
    record_type_of,
)
from ionotrail.terminal.ports import Listener, Port

HOST_ID_MODULUS = 1 << 16
"""Host ids are 16 bits on the line and wrap."""

DEFAULT_BAUDRATE = 115200

@dataclasses.dataclass(slots=True)
class SerialCounters:
    """What crossed the line and what went wrong, since the port was made."""

    records_in: int = 0
    records_out: int = 0
    line_errors: dict[str, int] = dataclasses.field(default_factory=dict)
    """Refused records (and runs of bytes) by reason."""
    disconnects: int = 0
    reconnects: int = 0
    reopen_failures: int = 0
    resets: int = 0
    error_answers_sent: int = 0
    error_answers_dropped: int = 0
    error_answers_received: int = 0
    frames_dropped_offline: int = 0
    frames_dropped_backlog: int = 0
    probes_sent: int = 0
    """Probe frames the port sent itself (a dialect without a probe stream)."""
    transmit_ok: int = 0
    transmit_failed: int = 0
    airtime_s: float = 0.0
    """Airtime the modem reported for its transmissions, failed ones included."""
    listener_errors: int = 0


class _Line(asyncio.Protocol):
    """One opening of the port; a stale line's callbacks are ignored."""

    def __init__(self, port: SerialPort, loop: asyncio.AbstractEventLoop) -> None:
        self.port = port
        self.closed: asyncio.Future[None] = loop.create_future()

    def data_received(self, data: bytes) -> None:
        self.port._data_received(self, data)

    def connection_lost(self, exc: Exception | None) -> None:
        if not self.closed.done():
            self.closed.set_result(None)
        self.port._connection_lost(self)


class _ThreadedTransport(asyncio.Transport):
    """A transport for a pyserial port the loop cannot watch.  The port must be
    open with a read timeout, so the reader thread notices a close."""

    def __init__(self, loop: asyncio.AbstractEventLoop, instance: Any, protocol: asyncio.Protocol) -> None:
        super().__init__()
        self._loop, self._serial, self._protocol = loop, instance, protocol
        self._closing = False
        self._lock = threading.Lock()
        self._pending = 0  # bytes handed to write() and not yet written
        self._writes: queue.SimpleQueue[bytes | None] = queue.SimpleQueue()
        threading.Thread(target=self._read_loop, name="serial-reader", daemon=True).start()
        threading.Thread(target=self._write_loop, name="serial-writer", daemon=True).start()
        loop.call_soon(protocol.connection_made, self)

    def _read_loop(self) -> None:
        while not self._closing:
            try:
                data = self._serial.read(self._serial.in_waiting or 1)
            except Exception as exc:  # noqa: BLE001 - whatever ends the line ends this thread; the loop learns why
                self._failed(exc)
                return
            if data and not self._closing:
                self._loop.call_soon_threadsafe(self._protocol.data_received, bytes(data))

    def _write_loop(self) -> None:
        while (data := self._writes.get()) is not None:
            try:
                self._serial.write(data)
            except Exception as exc:  # noqa: BLE001 - as in _read_loop
                self._failed(exc)
                return
            finally:
                with self._lock:
                    self._pending -= len(data)

    def _failed(self, exc: Exception) -> None:
        if not self._closing:
            self._loop.call_soon_threadsafe(self._finish, exc)

    def _finish(self, exc: Exception | None) -> None:
        if self._closing:
            return
        self._closing = True
        self._writes.put(None)
        self._loop.run_in_executor(None, self._serial.close)
        self._protocol.connection_lost(exc)

    def write(self, data: bytes | bytearray | memoryview) -> None:
        if self._closing:
            return
        with self._lock:
            self._pending += len(data)
        self._writes.put(bytes(data))

    def get_write_buffer_size(self) -> int:
        with self._lock:
            return self._pending

    def is_closing(self) -> bool:
        return self._closing

    def close(self) -> None:
        self._finish(None)

    def abort(self) -> None:
        self._finish(None)


THREADED_READ_TIMEOUT_S = 0.1
"""How often a reader thread looks up from a silent port to see whether it was closed."""


def _has_descriptor(instance: Any) -> bool:
    """Can the event loop watch this pyserial port's file descriptor?"""
    return type(instance).fileno is not io.RawIOBase.fileno


class SerialPort(Port):
    """A modem on a serial line (device, pseudo-terminal or TCP socket)."""

    def __init__(
        self,
        url: str,
        *,
        dialect: Dialect,
        configure: Configure | None = None,
        seed: int = 0,
        backoff_initial_s: float = BACKOFF_INITIAL_S,
        backoff_max_s: float = BACKOFF_MAX_S,
        baudrate: int = DEFAULT_BAUDRATE,
    ) -> None:
        if not (math.isfinite(backoff_initial_s) and backoff_initial_s > 0):
            raise UsageError(f"backoff_initial_s must be a positive number of seconds, not {backoff_initial_s!r}")
        if not (math.isfinite(backoff_max_s) and backoff_max_s >= backoff_initial_s):
            raise UsageError(f"backoff_max_s ({backoff_max_s!r}) must be at least backoff_initial_s ({backoff_initial_s!r})")
        self.url = url
        self.dialect = dialect
        self.configure = configure
        self.baudrate = baudrate
        self.backoff_initial_s = backoff_initial_s
        self.backoff_max_s = backoff_max_s
        self.counters = SerialCounters()
        self.clock = ModemClock()
        self.status: Status | None = None
        """The modem's last status record."""
        self._rng = random.Random(seed)
        self._listener: Listener | None = None
        self._listening: bool | None = None
        self._probe: tuple[bytes, float] | None = None
        self._stop_owed = False  # a probe stream was stopped while the line was down
        self._probe_handle: asyncio.Handle | None = None
        self._probe_epoch = 0.0
        self._probe_count = 0
        self._next_host_id = 0
        self._loop: asyncio.AbstractEventLoop | None = None
        self._line: _Line | None = None
        self._transport: asyncio.Transport | None = None
        self._stream: RecordStream | None = None
        self._reconnecting: asyncio.Task[None] | None = None
        self._opened = False
        self._closed = False

    # --- the Port interface -------------------------------------------------------

    @property
    def connected(self) -> bool:
        """Is the line open now?"""
        return self._transport is not None and not self._transport.is_closing()

    @property
    def unwritten_bytes(self) -> int:
        """Bytes the port holds that the line has not taken yet: frames and error
        answers stop at :data:`WRITE_BACKLOG_MAX_BYTES`; past it only the host's
        own settings (configure, listen, probe start and stop) are still written."""
        return self._transport.get_write_buffer_size() if self._transport is not None else 0

    async def open(self) -> None:
        """Open the line and send the modem its configuration and state.

        Raises ``OSError`` (pyserial's ``SerialException``) when the port
        cannot be opened, and :class:`UsageError` for a second call."""
        if self._opened or self._closed:
            raise UsageError("a SerialPort opens once")
        self._loop = asyncio.get_running_loop()
        await self._connect()
        self._opened = True
        if self._probe is not None and not self._carries(RecordType.PROBE_START):
            self._arm_probe_stream()

    def attach(self, listener: Listener) -> None:
        self._listener = listener

    def send(self, frame: bytes) -> None:
        record = Transmit(host_id=self._next_host_id, frame=frame)
        if not self.connected:
            self.counters.frames_dropped_offline += 1
            return
        if self._backlogged():
            self.counters.frames_dropped_backlog += 1
            return
        self._next_host_id = (self._next_host_id + 1) % HOST_ID_MODULUS
        self._write(record)

    def start_listening(self) -> None:
        self._set_listening(True)

    def stop_listening(self) -> None:
        self._set_listening(False)

    def start_probing(self, frame: bytes, interval: float) -> None:
        if not (math.isfinite(interval) and interval > 0):
            raise UsageError(f"probe interval must be a positive number of seconds, not {interval!r}")
        if self._carries(RecordType.PROBE_START):
            record = ProbeStart(interval_s=interval, frame=frame)
            self._probe = (frame, interval)
            self._write(record)
            return
        Transmit(host_id=0, frame=frame)  # refuses an unsendable probe now, not at the first tick
        restart = self._probe is None or self._probe[1] != interval
        self._probe = (frame, interval)
        if restart and self._opened and not self._closed:
            self._arm_probe_stream()

    def stop_probing(self) -> None:
        was_probing = self._probe is not None
        self._probe = None
        self._cancel_probe_stream()
        if was_probing and self._carries(RecordType.PROBE_STOP) and not self._write(ProbeStop()):
            self._stop_owed = True  # the line is down: say it when it is back

    async def close(self) -> None:
        """Stop the timers, tell the modem to stop probing, release the port.

        Bytes not yet handed to the operating system are discarded rather
        than waited for: a stalled modem must not hold the close."""
        if self._closed:
            return
        self._closed = True
        self._cancel_probe_stream()
        reconnecting, self._reconnecting = self._reconnecting, None
        if reconnecting is not None:
            reconnecting.cancel()
            try:
                await reconnecting
            except asyncio.CancelledError:
                pass
        line, transport = self._line, self._transport
        if self._probe is not None and self._carries(RecordType.PROBE_STOP):
            self._write(ProbeStop())
        self._listener = None
        if line is not None and transport is not None:
            transport.abort()
            try:
                await asyncio.wait_for(asyncio.shield(line.closed), CLOSE_TIMEOUT_S)
            except TimeoutError:
                pass
        self._line = self._transport = None
        self._stream = None

    # --- opening and reopening --------------------------------------------------------

    async def _connect(self) -> None:
        loop = self._loop
        assert loop is not None
        line = _Line(self, loop)
        transport: asyncio.Transport
        if urllib.parse.urlsplit(self.url).scheme == "socket":
            # pyserial-asyncio-fast makes the serial_for_url(url, do_not_open=True)
            # instance itself and connects the socket on the loop.
            transport, _ = await serial_asyncio_fast.create_serial_connection(
                loop, lambda: line, self.url, baudrate=self.baudrate
            )
        else:
            instance = serial.serial_for_url(self.url, do_not_open=True, baudrate=self.baudrate)
            threaded = not _has_descriptor(instance)
            if threaded:
                instance.timeout = THREADED_READ_TIMEOUT_S
            opening = loop.run_in_executor(None, instance.open)
            try:
                await asyncio.shield(opening)
            except asyncio.CancelledError:
                opening.add_done_callback(lambda done: _close_if_opened(done, instance))
                raise
            if threaded:
                transport = _ThreadedTransport(loop, instance, line)
            else:
                transport, _ = await serial_asyncio_fast.connection_for_serial(loop, lambda: line, instance)
        if self._closed:
            transport.abort()
            return
        self._line, self._transport = line, transport
        self._stream = self.dialect.stream(Side.HOST)
        self._restore_modem()

    def _connection_lost(self, line: _Line) -> None:
        if line is not self._line:
            return
        self._line = self._transport = None
        self._stream = None
        if self._closed:
            return
        self.counters.disconnects += 1
        assert self._loop is not None
        self._reconnecting = self._loop.create_task(self._reconnect())

    async def _reconnect(self) -> None:
        attempt = 0
        while not self._closed:
            await asyncio.sleep(self.backoff_delay(attempt))
            try:
                await self._connect()
            except Exception:  # noqa: BLE001 - any failure to reopen (OSError, termios, a driver's own) is retried, never fatal
                self.counters.reopen_failures += 1
                attempt += 1
                continue
            if self._line is not None:
                self.counters.reconnects += 1
            break
        self._reconnecting = None

    def backoff_delay(self, attempt: int) -> float:
        """The wait before reopening attempt ``attempt`` (0 for the first):
        exponential, capped at ``backoff_max_s``, jittered from the seeded generator."""
        delay = min(self.backoff_max_s, self.backoff_initial_s * 2.0 ** min(attempt, 64))
        return delay * self._rng.uniform(*BACKOFF_JITTER)

    def _restore_modem(self) -> None:
        """After an opening or a modem reset: its clock restarted, and it
        remembers nothing the host asked of it."""
        self.clock.reset()
        if self.configure is not None and self._carries(RecordType.CONFIGURE):
            self._write(self.configure)
        if self._listening is not None and self._carries(RecordType.LISTEN):
            self._write(Listen(on=self._listening))
        if self._probe is not None and self._carries(RecordType.PROBE_START):
            frame, interval = self._probe
            self._write(ProbeStart(interval_s=interval, frame=frame))
        elif self._stop_owed and self._carries(RecordType.PROBE_STOP):
            # A modem that kept its power while the line was down may still be
            # probing with the stream stopped meanwhile.
            self._write(ProbeStop())
        self._stop_owed = False

    # --- writing ------------------------------------------------------------------------

    def _carries(self, record_type: RecordType) -> bool:
        return self.dialect.carries(record_type)

    def _backlogged(self) -> bool:
        return self.unwritten_bytes > WRITE_BACKLOG_MAX_BYTES

    def _write(self, record: Record) -> bool:
        """Put ``record`` on the line if it is open; False when it was not."""
        transport = self._transport
        if transport is None or transport.is_closing():
            return False
        transport.write(self.dialect.encode(record))
        self.counters.records_out += 1
        return True

    def _set_listening(self, on: bool) -> None:
        self._listening = on
        if self._carries(RecordType.LISTEN):
            self._write(Listen(on=on))

    # --- probing kept by the host (a dialect without a probe stream) ---------------

    def _arm_probe_stream(self) -> None:
        self._cancel_probe_stream()
        assert self._loop is not None
        self._probe_epoch = self._loop.time()
        self._probe_count = 0
        self._probe_handle = self._loop.call_soon(self._probe_tick)

    def _cancel_probe_stream(self) -> None:
        if self._probe_handle is not None:
            self._probe_handle.cancel()
            self._probe_handle = None

    def _probe_tick(self) -> None:
        self._probe_handle = None
        if self._probe is None or self._closed:
            return
        assert self._loop is not None
        frame, interval = self._probe
        if self.connected and not self._backlogged():
            self._write(Transmit(host_id=self._next_host_id, frame=frame))
            self._next_host_id = (self._next_host_id + 1) % HOST_ID_MODULUS
            self.counters.probes_sent += 1
        # Keep the cadence on the epoch; after a stall, skip the probes missed.
        now = self._loop.time()
        self._probe_count = max(self._probe_count + 1, math.floor((now - self._probe_epoch) / interval) + 1)
        self._probe_handle = self._loop.call_at(self._probe_epoch + self._probe_count * interval, self._probe_tick)

    # --- reading -------------------------------------------------------------------------

    def _data_received(self, line: _Line, data: bytes) -> None:
        if line is not self._line or self._stream is None or self._loop is None:
            return
        now = self._loop.time()
        for item in self._stream.feed(data):
            if isinstance(item, LineError):
                self._line_error(item)
            else:
                self._record(item, now)

    def _line_error(self, error: LineError) -> None:
        errors = self.counters.line_errors
        errors[error.reason] = errors.get(error.reason, 0) + 1
        answerable = error.answer and error.reason in ANSWER_CODES and self._carries(RecordType.ERROR)
        if not answerable:
            return
        if self._backlogged():  # a modem that sends but does not read gets no flood of answers
            self.counters.error_answers_dropped += 1
        elif self._write(error_answer(error)):
            self.counters.error_answers_sent += 1

    def _record(self, record: Record, now: float) -> None:
        self.counters.records_in += 1
        if isinstance(record, Received):
            self._arrived(record, now)
        elif isinstance(record, Transmitted):
            if record.ok:
                self.counters.transmit_ok += 1
            else:
                self.counters.transmit_failed += 1
            if math.isfinite(record.airtime_s):
                self.counters.airtime_s += record.airtime_s
        elif isinstance(record, Status):
            self._observe(record.modem_time_s, now)
            self.status = record
        elif isinstance(record, Reset):
            self.counters.resets += 1
            self._restore_modem()
            self._observe(record.modem_time_s, now)
        elif isinstance(record, ErrorAnswer):
            self.counters.error_answers_received += 1
        else:
            # A host-to-modem record coming back: count it, never act on it.
            self.counters.records_in -= 1
            self._line_error(LineError(reason="wrong_direction", record_type=int(record_type_of(record)), answer=False))

    def _observe(self, modem_time_s: float, now: float) -> None:
        if math.isfinite(modem_time_s):
            self.clock.observe(modem_time_s, now)

    def _arrived(self, record: Received, now: float) -> None:
        if math.isfinite(record.modem_time_s):
            self.clock.observe(record.modem_time_s, now)
            time = self.clock.to_host(record.modem_time_s)
        else:
            time = now
        listener = self._listener
        if listener is None:
            return
        arrival = Arrival(frame=bytes(record.frame), time=time, snr_db=record.snr_db,
                          frequency_offset_hz=record.offset_hz)
        try:
            listener(arrival)
        except Exception as exc:  # noqa: BLE001 - the listener's fault, not the line's: report it, keep reading
            self.counters.listener_errors += 1
            assert self._loop is not None
            self._loop.call_exception_handler(
                {"message": "serial port listener failed", "exception": exc, "protocol": self}
            )


def _close_if_opened(done: asyncio.Future[None], instance: Any) -> None:
    """An opening cancelled mid-way still completes in its thread: close it."""
    if not done.cancelled() and done.exception() is None:
        instance.close()
