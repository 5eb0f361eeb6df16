"""The serial modem port over real pseudo-terminal pairs.

Each test plays the modem itself: it holds the master side of a pty pair
(``os.openpty()``, ``tty.setraw`` on the master), speaks a dialect on it
through the dialect's own modem-side stream, and the port opens the slave
side by its path as it would open a USB-serial device.  pyserial's
``loop://`` has no file descriptor to watch, so a pty is the smallest real
line.  Closing the master is what an unplugged USB adapter looks like to the
host: the slave's reads fail (EIO, or readiness without data).

Times are real and waits are bounded (a condition polled until a deadline of
a few seconds); nothing asserts how fast anything happened.
"""

from __future__ import annotations

import asyncio
import contextlib
import math
import os
import random
import socket
import threading
import tty
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest
import serial
import serial.rfc2217
from cobs import cobs
from ionotrail.terminal.errors import UsageError
from ionotrail.terminal.link.terminal import Arrival
from ionotrail.terminal.modem.dialects import Dialect, LineError, Side, dialect
from ionotrail.terminal.modem.records import (
    Configure,
    ErrorAnswer,
    ErrorCode,
    Listen,
    PaState,
    ProbeStart,
    ProbeStop,
    Received,
    Reset,
    ResetReason,
    Status,
    Transmit,
    Transmitted,
)
from ionotrail.terminal.ports.serial import WRITE_BACKLOG_MAX_BYTES, SerialPort
from ionotrail.terminal.wire.crc import crc16
from ionotrail.terminal.wire.serial_framing import encode_record

WAIT_S = 3.0
"""Longest wait for any expected condition (generous: a loaded CI machine)."""

# An invented modem configuration (demo values, not a real allocation).
CONFIGURE = Configure(tx_hz=40_120_000, rx_hz=40_120_000, bit_rate=4800, power_w=100.0)

# The modem's clock runs this far ahead of the loop's (invented: any offset will do).
MODEM_CLOCK_AHEAD_S = 5000.0


async def until(condition: Callable[[], bool], what: str, timeout: float = WAIT_S) -> None:
    """Poll ``condition`` until it holds; fail naming ``what`` after ``timeout`` seconds."""
    loop = asyncio.get_running_loop()
    deadline = loop.time() + timeout
    while not condition():
        if loop.time() > deadline:
            pytest.fail(f"timed out waiting for {what}")
        await asyncio.sleep(0.005)


class Pty:
    """A pseudo-terminal pair: the test keeps the master, the port opens the slave by path."""

    def __init__(self) -> None:
        self.master, self.slave = os.openpty()
        tty.setraw(self.master)
        os.set_blocking(self.master, False)
        self.path = os.ttyname(self.slave)
        self.open = True

    def release_slave(self) -> None:
        """Leave the slave side to the port alone, as a device is: when the port
        closes it, the master's reads fail."""
        if self.slave >= 0:
            os.close(self.slave)
            self.slave = -1

    def close(self) -> None:
        self.release_slave()
        if self.open:
            self.open = False
            os.close(self.master)


@pytest.fixture
def ptys() -> Iterator[Callable[[], Pty]]:
    made: list[Pty] = []

    def make() -> Pty:
        made.append(Pty())
        return made[-1]

    yield make
    for pty in made:
        pty.close()


class ScriptedModem:
    """The modem end of a pty, written here: it decodes what the host sends with
    the dialect's modem-side stream and writes records the dialect encodes."""

    def __init__(self, pty: Pty, line: Dialect, *, answer_transmit: bool = False) -> None:
        self.pty = pty
        self.dialect = line
        self.stream = line.stream(Side.MODEM)
        self.answer_transmit = answer_transmit
        self.records: list[Any] = []
        self.errors: list[LineError] = []
        self.loop = asyncio.get_running_loop()
        self.loop.add_reader(pty.master, self._readable)
        self.reading = True

    def _readable(self) -> None:
        try:
            data = os.read(self.pty.master, 4096)
        except BlockingIOError:
            return
        except OSError:
            data = b""
        if not data:  # the host closed its side
            self._stop_reading()
            return
        for item in self.stream.feed(data):
            if isinstance(item, LineError):
                self.errors.append(item)
                continue
            self.records.append(item)
            if self.answer_transmit and isinstance(item, Transmit):
                airtime = 0.001 * len(item.frame)
                ok = not item.frame.startswith(b"FAIL")
                self.loop.create_task(self.send(Transmitted(host_id=item.host_id, ok=ok, airtime_s=airtime)))

    def _stop_reading(self) -> None:
        if self.reading:
            self.reading = False
            self.loop.remove_reader(self.pty.master)

    def of(self, kind: type) -> list[Any]:
        return [r for r in self.records if isinstance(r, kind)]

    async def write(self, data: bytes) -> None:
        view = memoryview(data)
        while view:
            try:
                n = os.write(self.pty.master, view)
            except BlockingIOError:
                await asyncio.sleep(0.001)
                continue
            view = view[n:]

    async def send(self, record: Any) -> None:
        await self.write(self.dialect.encode(record))

    def unplug(self) -> None:
        self._stop_reading()
        self.pty.close()


def our_record(head: int, body: bytes, *, crc_ok: bool = True) -> bytes:
    """A record of our dialect built by hand: head, body, CRC-16 (big-endian), COBS, delimiter
    (the layout of the host-modem contract, issue 10)."""
    crc = crc16(bytes([head]) + body)
    if not crc_ok:
        crc ^= 0x0001
    return encode_record(bytes([head]) + body + crc.to_bytes(2, "big"))


async def opened(pty_path: str, line: str, **kwargs: Any) -> SerialPort:
    port = SerialPort(pty_path, dialect=dialect(line), **kwargs)
    await port.open()
    return port


def modem_now() -> float:
    return asyncio.get_running_loop().time() + MODEM_CLOCK_AHEAD_S


# --- transmit ------------------------------------------------------------------------


@pytest.mark.asyncio
async def test_send_is_a_transmit_record_and_its_answers_are_counted(ptys: Callable[[], Pty]) -> None:
    pty = ptys()
    modem = ScriptedModem(pty, dialect("ionotrail"), answer_transmit=True)
    port = await opened(pty.path, "ionotrail", configure=CONFIGURE)
    try:
        await until(lambda: len(modem.records) >= 1, "the configuration")
        assert modem.records[0] == CONFIGURE
        port.start_listening()
        port.send(b"first")
        port.send(b"FAIL second")
        port.send(b"third")
        await until(lambda: port.counters.transmit_ok + port.counters.transmit_failed == 3, "three answers")
        assert modem.records[1] == Listen(on=True)
        assert [(t.host_id, t.frame) for t in modem.of(Transmit)] == [
            (0, b"first"), (1, b"FAIL second"), (2, b"third")]
        assert (port.counters.transmit_ok, port.counters.transmit_failed) == (2, 1)
        # Airtime is what the modem reported (the scripted modem: 1 ms per byte).
        assert port.counters.airtime_s == pytest.approx(0.001 * (5 + 11 + 5), abs=1e-5)
        assert port.counters.records_out == 5
        assert port.counters.records_in == 3
        assert port.counters.line_errors == {}
    finally:
        await port.close()


# --- receive and the clock ---------------------------------------------------------


@pytest.mark.asyncio
async def test_received_frames_reach_the_listener_on_the_loop_clock(ptys: Callable[[], Pty]) -> None:
    pty = ptys()
    modem = ScriptedModem(pty, dialect("ionotrail"))
    port = await opened(pty.path, "ionotrail")
    arrivals: list[Arrival] = []
    port.attach(arrivals.append)
    loop = asyncio.get_running_loop()
    try:
        # A few status records let the port see the modem's clock (5000 s ahead of the loop's).
        for _ in range(4):
            await modem.send(Status(modem_time_s=modem_now(), temperature_c=31.5, supply_v=13.2,
                                    pa=PaState.OFF, reflected_w=0.0))
            await asyncio.sleep(0.01)
        await until(lambda: port.status is not None and port.counters.records_in == 4, "the status records")
        await asyncio.sleep(0.4)
        # A frame whose last bit arrived 0.3 s before the modem reported it, then one reported at once
        # (modem times still increase: frames are reported in the order they arrived).
        held_at = loop.time()
        await modem.send(Received(modem_time_s=held_at - 0.3 + MODEM_CLOCK_AHEAD_S, snr_db=math.nan,
                                  offset_hz=math.nan, frame=b"held"))
        sent_at = loop.time()
        await modem.send(Received(modem_time_s=sent_at + MODEM_CLOCK_AHEAD_S, snr_db=12.5, offset_hz=-40.0,
                                  frame=b"now"))
        await until(lambda: len(arrivals) == 2, "two arrivals")
        held, now = arrivals
        assert held.frame == b"held" and now.frame == b"now"
        # Mapped onto the loop's clock (within the line's latency), not the modem's, and not the read time.
        assert held.time == pytest.approx(held_at - 0.3, abs=0.1)
        assert now.time == pytest.approx(sent_at, abs=0.1)
        assert now.snr_db == pytest.approx(12.5) and now.frequency_offset_hz == pytest.approx(-40.0)
        assert math.isnan(held.snr_db) and math.isnan(held.frequency_offset_hz)
    finally:
        await port.close()


# --- KISS -----------------------------------------------------------------------------


@pytest.mark.asyncio
async def test_kiss_probing_is_kept_by_the_host(ptys: Callable[[], Pty]) -> None:
    pty = ptys()
    modem = ScriptedModem(pty, dialect("kiss"))
    port = await opened(pty.path, "kiss", configure=CONFIGURE)
    arrivals: list[Arrival] = []
    port.attach(arrivals.append)
    loop = asyncio.get_running_loop()
    try:
        port.start_listening()  # KISS cannot say it: skipped
        port.start_probing(b"probe-1", 0.02)
        await until(lambda: len(modem.of(Transmit)) >= 3, "three probes")
        port.start_probing(b"probe-2", 0.02)  # same cadence, new content
        await until(lambda: any(t.frame == b"probe-2" for t in modem.of(Transmit)), "the new probe")
        port.stop_probing()
        sent = port.counters.probes_sent
        await asyncio.sleep(0.1)  # five intervals: a probe still running would show
        await until(lambda: len(modem.of(Transmit)) >= sent, "the probes already on the line")
        probes = modem.of(Transmit)
        assert len(probes) == sent == port.counters.probes_sent
        frames = [t.frame for t in probes]
        switch = frames.index(b"probe-2")
        assert set(frames[:switch]) == {b"probe-1"} and set(frames[switch:]) == {b"probe-2"}
        assert modem.records == probes  # nothing else went on the line: no Configure, no Listen

        # A received KISS frame has no timestamp or SNR: read time and NaN.
        before = loop.time()
        await modem.send(Received(modem_time_s=math.nan, snr_db=math.nan, offset_hz=math.nan, frame=b"\xc0\xdb data"))
        await until(lambda: len(arrivals) == 1, "the KISS frame")
        assert arrivals[0].frame == b"\xc0\xdb data"
        assert before <= arrivals[0].time <= loop.time()
        assert math.isnan(arrivals[0].snr_db)
    finally:
        await port.close()


# --- refused records ----------------------------------------------------------------


@pytest.mark.asyncio
async def test_malformed_and_unknown_records_are_answered_with_error_records(ptys: Callable[[], Pty]) -> None:
    pty = ptys()
    modem = ScriptedModem(pty, dialect("ionotrail"))
    port = await opened(pty.path, "ionotrail")
    try:
        # Heads per the host-modem contract (issue 10): version in the high nibble, type in the low.
        await modem.write(our_record(0x1F, b"\x01\x02"))                      # type 15: no such record
        await modem.write(our_record(0x18, b"\x00", crc_ok=False))            # Transmitted, CRC wrong
        await modem.write(our_record(0x18, b"\x00"))                          # Transmitted, body cut short
        await modem.write(our_record(0x58, b"\x00\x01\x00\x00\x00\x00\x00"))  # version 5
        await until(lambda: len(modem.of(ErrorAnswer)) == 4, "four error answers")
        answers = modem.of(ErrorAnswer)
        assert {a.code for a in answers} == {
            ErrorCode.UNKNOWN_TYPE, ErrorCode.BAD_CRC, ErrorCode.MALFORMED, ErrorCode.UNSUPPORTED_VERSION}
        assert ErrorAnswer(code=ErrorCode.UNKNOWN_TYPE, record_type=15) in answers
        assert ErrorAnswer(code=ErrorCode.MALFORMED, record_type=8) in answers
        errors = port.counters.line_errors
        assert (errors.get("unknown_type"), errors.get("bad_crc"), errors.get("malformed"),
                errors.get("unsupported_version")) == (1, 1, 1, 1)
        assert port.counters.error_answers_sent == 4

        # The modem's own error answers are counted, and the line still works.
        await modem.send(ErrorAnswer(code=ErrorCode.NOT_READY, record_type=1))
        await until(lambda: port.counters.error_answers_received == 1, "the modem's error answer")
        port.send(b"still here")
        await until(lambda: modem.of(Transmit) != [], "a transmit after the errors")
        assert port.connected
    finally:
        await port.close()


@pytest.mark.asyncio
async def test_ten_thousand_bytes_of_line_noise_cost_only_the_damaged_records(ptys: Callable[[], Pty]) -> None:
    pty = ptys()
    modem = ScriptedModem(pty, dialect("ionotrail"))
    port = await opened(pty.path, "ionotrail")
    arrivals: list[Arrival] = []
    port.attach(arrivals.append)
    rng = random.Random(20240611)
    try:
        bursts, burst_bytes, per_burst = 20, 500, 3
        for burst in range(bursts):
            await modem.write(rng.randbytes(burst_bytes))
            for k in range(per_burst):
                frame = f"good {burst}.{k}".encode()
                await modem.send(Received(modem_time_s=modem_now(), snr_db=10.0, offset_hz=0.0, frame=frame))
        # One record with a byte flipped after the noise, then a clean one.
        damaged = bytearray(dialect("ionotrail").encode(
            Received(modem_time_s=modem_now(), snr_db=10.0, offset_hz=0.0, frame=b"damaged")))
        damaged[5] ^= 0x40
        await modem.write(bytes(damaged))
        await modem.send(Received(modem_time_s=modem_now(), snr_db=10.0, offset_hz=0.0, frame=b"last"))
        await until(lambda: any(a.frame == b"last" for a in arrivals), "the record after the noise")

        received = {a.frame for a in arrivals}
        # The first record after a burst of noise may share its frame with the noise's tail
        # (COBS resynchronises at the next delimiter); the ones after it must all arrive.
        for burst in range(bursts):
            for k in range(1, per_burst):
                assert f"good {burst}.{k}".encode() in received
        assert b"damaged" not in received
        assert sum(port.counters.line_errors.values()) >= bursts
        assert port.connected
        assert port.counters.disconnects == 0
    finally:
        await port.close()


# --- unplug, replug, reset ------------------------------------------------------------


def point(link: Path, target: str) -> None:
    """Re-point a symbolic link atomically, as udev re-points /dev/serial/by-id on a replug."""
    fresh = link.with_name(link.name + ".new")
    fresh.unlink(missing_ok=True)
    fresh.symlink_to(target)
    os.replace(fresh, link)


@pytest.mark.asyncio
async def test_an_unplugged_modem_is_reopened_with_backoff_and_its_state_restored(
    ptys: Callable[[], Pty], tmp_path: Path
) -> None:
    link = tmp_path / "modem"
    first = ptys()
    point(link, first.path)
    modem = ScriptedModem(first, dialect("ionotrail"))
    port = await opened(str(link), "ionotrail", configure=CONFIGURE, seed=7,
                        backoff_initial_s=0.02, backoff_max_s=0.1)
    try:
        port.start_listening()
        port.start_probing(b"probe", 1.0)
        state = [CONFIGURE, Listen(on=True), ProbeStart(interval_s=1.0, frame=b"probe")]
        await until(lambda: modem.records == state, "the modem's state")

        modem.unplug()
        link.unlink()  # as udev removes a device's by-id link (and another pty may take the old number)
        await until(lambda: not port.connected, "the port to see the unplug")
        port.send(b"lost in the gap")  # dropped and counted: the link above retransmits
        assert port.counters.frames_dropped_offline == 1
        await until(lambda: port.counters.reopen_failures >= 2, "failed attempts while unplugged")

        second = ptys()
        point(link, second.path)
        replugged = ScriptedModem(second, dialect("ionotrail"))
        await until(lambda: port.connected, "the reconnect")
        await until(lambda: replugged.records == state, "the state sent again")
        assert (port.counters.disconnects, port.counters.reconnects) == (1, 1)
        port.send(b"after")
        await until(lambda: replugged.of(Transmit) != [], "a transmit after the reconnect")
        assert replugged.of(Transmit)[0].frame == b"after"
        assert all(b"lost in the gap" != getattr(r, "frame", None) for r in replugged.records)
    finally:
        await port.close()


@pytest.mark.asyncio
async def test_a_modem_reset_gets_its_configuration_back_and_restarts_the_clock(ptys: Callable[[], Pty]) -> None:
    pty = ptys()
    modem = ScriptedModem(pty, dialect("ionotrail"))
    port = await opened(pty.path, "ionotrail", configure=CONFIGURE)
    arrivals: list[Arrival] = []
    port.attach(arrivals.append)
    loop = asyncio.get_running_loop()
    try:
        port.start_listening()
        port.start_probing(b"probe", 2.0)
        await until(lambda: len(modem.records) == 3, "the modem's state")
        await modem.send(Status(modem_time_s=modem_now(), temperature_c=30.0, supply_v=13.0,
                                pa=PaState.ON, reflected_w=0.5))
        await until(lambda: port.status is not None, "a status record")
        modem.records.clear()

        # The modem restarts: its clock starts again near zero.
        booted_at = loop.time()
        await modem.send(Reset(modem_time_s=0.0, reason=ResetReason.WATCHDOG))
        await until(lambda: len(modem.records) == 3, "the state sent again")
        assert modem.records == [CONFIGURE, Listen(on=True), ProbeStart(interval_s=2.0, frame=b"probe")]
        assert port.counters.resets == 1

        sent_at = loop.time()
        await modem.send(Received(modem_time_s=sent_at - booted_at, snr_db=8.0, offset_hz=0.0, frame=b"after"))
        await until(lambda: len(arrivals) == 1, "a frame after the reset")
        assert arrivals[0].time == pytest.approx(sent_at, abs=0.1)  # not 5000 s off: the old estimate is gone
    finally:
        await port.close()


@pytest.mark.asyncio
async def test_close_while_reconnecting_stops_the_attempts(ptys: Callable[[], Pty], tmp_path: Path) -> None:
    pty = ptys()
    link = tmp_path / "modem"
    point(link, pty.path)
    modem = ScriptedModem(pty, dialect("kiss"))
    port = await opened(str(link), "kiss", backoff_initial_s=0.02, backoff_max_s=0.05)
    port.start_probing(b"probe", 0.01)
    await until(lambda: modem.of(Transmit) != [], "a probe")
    modem.unplug()
    link.unlink()
    await until(lambda: port.counters.reopen_failures >= 1, "a failed attempt")
    await asyncio.wait_for(port.close(), WAIT_S)
    failures = port.counters.reopen_failures
    await asyncio.sleep(0.1)
    assert port.counters.reopen_failures == failures
    assert port.counters.reconnects == 0 and not port.connected


@pytest.mark.asyncio
async def test_close_stops_the_probe_stream_and_releases_the_line(ptys: Callable[[], Pty]) -> None:
    pty = ptys()
    modem = ScriptedModem(pty, dialect("ionotrail"))
    port = await opened(pty.path, "ionotrail")
    pty.release_slave()
    port.start_probing(b"probe", 1.0)
    await until(lambda: modem.of(ProbeStart) != [], "the probe stream")
    await port.close()
    await until(lambda: modem.of(ProbeStop) != [], "the probe stop")
    await until(lambda: not modem.reading, "the host's side to close")
    assert not port.connected


# --- construction and the backoff ----------------------------------------------------


def test_backoff_is_exponential_bounded_and_replays_from_its_seed() -> None:
    def delays(seed: int) -> list[float]:
        port = SerialPort("/nonexistent", dialect=dialect("kiss"), seed=seed,
                          backoff_initial_s=0.1, backoff_max_s=2.0)
        return [port.backoff_delay(k) for k in range(10)]

    first = delays(3)
    assert first == delays(3)
    assert first != delays(4)
    for k, delay in enumerate(first):
        ceiling = min(2.0, 0.1 * 2**k)
        assert ceiling / 2 <= delay <= ceiling  # equal jitter: half fixed, half random (common practice, no source)


@pytest.mark.parametrize(("initial", "maximum"), [(0.0, 1.0), (-1.0, 1.0), (1.0, 0.5), (math.nan, 1.0)])
def test_backoff_limits_are_checked(initial: float, maximum: float) -> None:
    with pytest.raises(UsageError):
        SerialPort("/nonexistent", dialect=dialect("kiss"), backoff_initial_s=initial, backoff_max_s=maximum)


class _PtyWithoutModemLines(serial.Serial):  # type: ignore[misc]
    """A pseudo-terminal has no modem-control lines; an RFC 2217 server asks for them."""

    cts = dsr = ri = cd = property(lambda self: False)

    def _update_dtr_state(self) -> None:
        pass

    def _update_rts_state(self) -> None:
        pass


@contextlib.contextmanager
def rfc2217_server(device: str) -> Iterator[str]:
    """An RFC 2217 server (pyserial's own PortManager, the server side of the protocol)
    for ``device`` on a loopback TCP port; yields the rfc2217:// URL."""
    line = _PtyWithoutModemLines(device, 115200, timeout=0.05)
    listener = socket.create_server(("127.0.0.1", 0))
    stop = threading.Event()

    def serve() -> None:
        client, _ = listener.accept()
        client.settimeout(0.05)

        class Connection:
            def write(self, data: bytes) -> None:
                client.sendall(data)

        manager = serial.rfc2217.PortManager(line, Connection())
        while not stop.is_set():
            data = line.read(line.in_waiting or 1)
            if data:
                client.sendall(b"".join(manager.escape(data)))
            try:
                received = client.recv(4096)
            except TimeoutError:
                continue
            if not received:
                break
            line.write(b"".join(manager.filter(received)))
        client.close()

    thread = threading.Thread(target=serve, daemon=True)
    thread.start()
    try:
        yield f"rfc2217://127.0.0.1:{listener.getsockname()[1]}"
    finally:
        stop.set()
        thread.join(timeout=5)
        listener.close()
        line.close()


@pytest.mark.asyncio
async def test_an_rfc2217_modem_is_served_from_threads() -> None:
    # pyserial serves rfc2217:// without a file descriptor (pyserial documentation, URL
    # handlers); the port reads and writes it from threads instead.
    master_fd, slave_fd = os.openpty()
    tty.setraw(master_fd)
    tty.setraw(slave_fd)
    os.set_blocking(master_fd, False)
    heard: list[Arrival] = []
    modem_side = dialect("ionotrail").stream(Side.MODEM)
    seen: list[object] = []
    with rfc2217_server(os.ttyname(slave_fd)) as url:
        port = SerialPort(url, dialect=dialect("ionotrail"), configure=Configure(1, 2, 2000, 10.0))
        port.attach(heard.append)
        await port.open()
        try:
            port.start_listening()

            def read_modem() -> bool:
                with contextlib.suppress(BlockingIOError):
                    seen.extend(modem_side.feed(os.read(master_fd, 4096)))
                return len(seen) >= 2

            await until(read_modem, "configure and listen through the RFC 2217 server")
            assert seen[:2] == [Configure(1, 2, 2000, 10.0), Listen(on=True)]
            os.write(master_fd, dialect("ionotrail").encode(Received(5.0, 12.5, 80.0, b"\x11\x07\x00\x01\x00")))
            await until(lambda: bool(heard), "a received frame through the RFC 2217 server")
            assert heard[0].frame == b"\x11\x07\x00\x01\x00" and heard[0].snr_db == pytest.approx(12.5)
        finally:
            await port.close()
    os.close(master_fd)
    os.close(slave_fd)


@pytest.mark.asyncio
async def test_a_missing_device_fails_to_open() -> None:
    port = SerialPort("/dev/ionotrail-no-such-modem", dialect=dialect("kiss"))
    with pytest.raises(OSError):
        await port.open()


# --- a modem behind a TCP socket, and a modem that stops reading ------------------------


@pytest.mark.asyncio
async def test_a_socket_modem_that_hangs_up_is_reconnected() -> None:
    line = dialect("ionotrail")
    sessions: list[list[Any]] = []
    hang_up = asyncio.Event()

    async def modem(reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        records: list[Any] = []
        sessions.append(records)
        stream = line.stream(Side.MODEM)
        while data := await reader.read(4096):
            records.extend(r for r in stream.feed(data) if not isinstance(r, LineError))
            if len(sessions) == 1 and hang_up.is_set():
                break
        writer.close()

    server = await asyncio.start_server(modem, "127.0.0.1", 0)
    host, tcp_port = server.sockets[0].getsockname()[:2]
    port = SerialPort(f"socket://{host}:{tcp_port}", dialect=line, configure=CONFIGURE,
                      backoff_initial_s=0.02, backoff_max_s=0.1)
    try:
        await port.open()
        port.start_listening()
        await until(lambda: len(sessions) == 1 and len(sessions[0]) == 2, "the first session's state")
        hang_up.set()
        port.send(b"goodbye")  # the modem hangs up after reading this
        await until(lambda: len(sessions) == 2 and len(sessions[1]) == 2, "the second session's state")
        assert sessions[1] == [CONFIGURE, Listen(on=True)]
        assert (port.counters.disconnects, port.counters.reconnects) == (1, 1)
    finally:
        await port.close()
        server.close()
        await server.wait_closed()


@pytest.mark.asyncio
async def test_a_modem_that_stops_reading_costs_dropped_frames_not_memory(ptys: Callable[[], Pty]) -> None:
    pty = ptys()  # nobody reads the master: the kernel's buffer fills, then the port's
    port = await opened(pty.path, "ionotrail")
    try:
        frame = bytes(range(1, 201))
        for _ in range(5000):
            port.send(frame)
            if port.counters.frames_dropped_backlog:
                break
            await asyncio.sleep(0)
        assert port.counters.frames_dropped_backlog == 1
        record_bytes = len(dialect("ionotrail").encode(Transmit(host_id=0, frame=frame)))
        assert 0 < port.unwritten_bytes <= WRITE_BACKLOG_MAX_BYTES + record_bytes
        assert port.connected
    finally:
        await asyncio.wait_for(port.close(), WAIT_S)


@pytest.mark.asyncio
async def test_a_modem_that_sends_refusable_records_but_never_reads_cannot_grow_the_write_backlog() -> None:
    # Found by review: every bad record got an error answer, and a modem that does not
    # read let them pile up without bound.  Error answers stop at the backlog limit.
    master_fd, slave_fd = os.openpty()
    tty.setraw(slave_fd)
    os.set_blocking(master_fd, False)
    port = SerialPort(os.ttyname(slave_fd), dialect=dialect("ionotrail"))
    await port.open()
    try:
        junk = cobs.encode(b"\x19\x22\x33") + b"\x00"  # a record with a bad CRC: answerable
        for _ in range(400):
            with contextlib.suppress(BlockingIOError):
                os.write(master_fd, junk * 200)
            await asyncio.sleep(0.002)
        await asyncio.sleep(0.2)
        answer_bytes = len(dialect("ionotrail").encode(ErrorAnswer(ErrorCode.BAD_CRC, 0)))
        assert port.unwritten_bytes <= WRITE_BACKLOG_MAX_BYTES + answer_bytes
        assert port.counters.error_answers_dropped > 0
    finally:
        await port.close()
        os.close(master_fd)
        os.close(slave_fd)


@pytest.mark.asyncio
async def test_a_probe_stream_stopped_while_the_line_was_down_is_stopped_on_reconnect() -> None:
    # Found by review: a modem that kept its power over a dropped line kept probing.
    sessions: list[list[str]] = []
    writers: list[asyncio.StreamWriter] = []

    async def modem(reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        stream, seen = dialect("ionotrail").stream(Side.MODEM), []
        sessions.append(seen)
        writers.append(writer)
        while data := await reader.read(4096):
            seen += [type(item).__name__ for item in stream.feed(data)]

    server = await asyncio.start_server(modem, "127.0.0.1", 0)
    url = f"socket://127.0.0.1:{server.sockets[0].getsockname()[1]}"
    port = SerialPort(url, dialect=dialect("ionotrail"), configure=Configure(1, 2, 2000, 10.0), backoff_initial_s=0.2)
    try:
        await port.open()
        port.start_listening()
        port.start_probing(b"\x05\x00\x01\x02\x03", 0.5)
        await until(lambda: sessions and sessions[0][-1:] == ["ProbeStart"], "the first session's state")
        writers[0].close()  # the line drops; the modem keeps its power (and its probe stream)
        await until(lambda: not port.connected, "the line to drop")
        port.stop_probing()
        await until(lambda: len(sessions) == 2 and sessions[1][-1:] == ["ProbeStop"], "the stop to be said on reconnect")
        assert sessions[1] == ["Configure", "Listen", "ProbeStop"]
    finally:
        await port.close()
        server.close()
