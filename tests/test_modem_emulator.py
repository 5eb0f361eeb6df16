"""The modem emulator over real pseudo-terminals, in real time at a large time scale.

A test host opens each station's pty path with pyserial, as any terminal
software would, and speaks the host-modem interface through its dialect.
The channel is the demo scenario's with hand-made trails
(harness/channel/model.py ``with_openings``), so what must arrive is known.
Waits are short and bounded: every wait polls until its condition holds or
its deadline passes.
"""

from __future__ import annotations

import asyncio
import binascii
import contextlib
import itertools
import math
import os
import tty
from collections.abc import AsyncIterator, Callable
from pathlib import Path
from typing import Any

import pytest
import serial
from cobs import cobs
from ionotrail.harness.channel import scenario
from ionotrail.harness.channel.model import Channel, Opening, TrailSet, with_openings
from ionotrail.harness.cli.main import main
from ionotrail.harness.emulators.lines import DeviceLine, PtyLine, TcpLine
from ionotrail.harness.emulators.modem import ROLES, ModemEmulator
from ionotrail.terminal.modem import records as r
from ionotrail.terminal.modem.dialects import Side, dialect

SCENARIO = scenario.load(None, ["scenario.duration_hours=1"])
BASE = TrailSet(SCENARIO)
SCALE = 10.0  # emulated seconds per wall second
OPEN = [Opening(0.0, 40.0, 1.0, hold=3000.0)]  # a 40 dB plateau over the whole test: the path is open
CLOSED = [Opening(3500.0, 40.0, 1.0)]  # one trail, long after the test: the path is closed
FRAME = bytes(range(1, 41))  # 40 bytes; the emulator does not read frames, any bytes pass


def channel(openings: list[Opening]) -> Channel:
    return Channel(with_openings(BASE, openings))


class Host:
    """A host program on one station's line: pyserial on the pty path, the dialect's codec."""

    def __init__(self, path: Path | str, dialect_name: str = "ionotrail") -> None:
        self.port = serial.Serial(str(path), timeout=0)
        self.dialect = dialect(dialect_name)
        self.stream = self.dialect.stream(Side.HOST)
        self.seen: list[Any] = []

    def send(self, record: Any) -> None:
        self.port.write(self.dialect.encode(record))

    def poll(self) -> None:
        self.seen.extend(self.stream.feed(self.port.read(65536)))

    async def wait_for(self, found: Callable[[Any], bool], timeout: float = 2.0) -> Any:
        """The first record (or line error) seen that satisfies ``found``, consumed."""
        deadline = asyncio.get_running_loop().time() + timeout
        while True:
            self.poll()
            for i, item in enumerate(self.seen):
                if found(item):
                    del self.seen[: i + 1]
                    return item
            if asyncio.get_running_loop().time() > deadline:
                raise AssertionError(f"nothing matching within {timeout} s; seen {self.seen[:5]}")
            await asyncio.sleep(0.005)

    async def gather(self, seconds: float) -> list[Any]:
        """Everything seen over the next ``seconds`` of wall time."""
        await asyncio.sleep(seconds)
        self.poll()
        seen, self.seen = self.seen, []
        return seen

    def close(self) -> None:
        self.port.close()


def of(kind: type) -> Callable[[Any], bool]:
    return lambda item: isinstance(item, kind)


@contextlib.asynccontextmanager
async def emulated(
    tmp_path: Path, openings: list[Opening], dialect_name: str = "ionotrail", scale: float = SCALE, **options: Any
) -> AsyncIterator[tuple[ModemEmulator, Host, Host, list[str]]]:
    said: list[str] = []
    lines = {role: PtyLine(tmp_path / role) for role in ROLES}
    emulator = ModemEmulator(
        channel(openings), SCENARIO, lines, {role: dialect(dialect_name) for role in ROLES},
        time_scale=scale, say=said.append, **options,
    )  # fmt: skip
    async with emulator:
        terminal, master = Host(tmp_path / "terminal", dialect_name), Host(tmp_path / "master", dialect_name)
        try:
            yield emulator, terminal, master, said
        finally:
            terminal.close()
            master.close()


@pytest.mark.asyncio
async def test_a_frame_crosses_an_open_path_with_the_models_snr_and_offset(tmp_path: Path) -> None:
    async with emulated(tmp_path, OPEN) as (em, terminal, master, _):
        assert os.path.islink(tmp_path / "terminal") and os.readlink(tmp_path / "terminal").startswith("/dev/pts/")
        terminal.send(r.Transmit(7, FRAME))
        done = await terminal.wait_for(of(r.Transmitted))
        # Airtime = bits / bit rate (definition): 320 bits at the demo's 4800 bit/s.
        assert done == r.Transmitted(7, True, 320 / 4800)
        got = await master.wait_for(of(r.Received))
        assert got.frame == FRAME
        # The hand-made trail holds its 40 dB peak without fading (harness/channel/model.py Opening).
        assert got.snr_db == pytest.approx(40.0, abs=0.01)
        # Offset = oscillator ppm x carrier; hand-made trails have no Doppler.  The demo's
        # 2 ppm at the 40.52 MHz uplink: 81.04 Hz (field notes: 2 ppm = 100 Hz at 50 MHz).
        assert got.offset_hz == pytest.approx(2e-6 * 40.52e6, abs=0.05)
        assert 0 < got.modem_time_s < 5
        assert em.terminal.counters.frames_delivered == 1
        # And back down, at the 41.61 MHz downlink.
        master.send(r.Transmit(8, FRAME[:10]))
        down = await terminal.wait_for(of(r.Received))
        assert down.frame == FRAME[:10] and down.offset_hz == pytest.approx(2e-6 * 41.61e6, abs=0.05)


@pytest.mark.asyncio
async def test_frames_sent_while_no_trail_is_open_never_arrive(tmp_path: Path) -> None:
    async with emulated(tmp_path, CLOSED) as (em, terminal, master, _):
        for host_id in range(5):
            terminal.send(r.Transmit(host_id, FRAME))
        answers = [await terminal.wait_for(of(r.Transmitted)) for _ in range(5)]
        assert [a.host_id for a in answers] == list(range(5)) and all(a.ok for a in answers)  # the radio sent them
        master.send(r.ProbeStart(0.1, b"probe"))
        assert [x for x in await master.gather(0.2) + await terminal.gather(0.0) if isinstance(x, r.Received)] == []
        assert em.terminal.counters.frames_lost == 5
        # With no trail open, no probe is even simulated: the stream waits for the next window.
        assert em.master.counters.probes_in_openings == 0


@pytest.mark.asyncio
async def test_the_modem_runs_the_probe_stream_until_told_to_stop(tmp_path: Path) -> None:
    async with emulated(tmp_path, OPEN) as (em, terminal, master, _):
        master.send(r.ProbeStart(0.1, b"probe-1"))
        await terminal.wait_for(lambda x: isinstance(x, r.Received) and x.frame == b"probe-1")
        probes = [x for x in await terminal.gather(0.5) if isinstance(x, r.Received)]
        # 0.5 s of wall time at 10x is 5 emulated seconds: about 50 probes at 0.1 s (arithmetic).
        assert 35 <= len(probes) <= 60
        times = [p.modem_time_s for p in probes]
        gaps = [b - a for a, b in itertools.pairwise(times)]
        # The modem's clock counts wall seconds: the 0.1 s cadence shows as 0.01 s at 10x.
        assert sorted(gaps)[len(gaps) // 2] == pytest.approx(0.1 / SCALE, rel=0.1)
        master.send(r.ProbeStart(0.1, b"probe-2"))  # same cadence, new content from the next probe on
        await terminal.wait_for(lambda x: isinstance(x, r.Received) and x.frame == b"probe-2")
        master.send(r.ProbeStop())
        await asyncio.sleep(0.05)
        terminal.poll()
        terminal.seen.clear()
        assert [x for x in await terminal.gather(0.2) if isinstance(x, r.Received)] == []
        assert em.master.counters.probe_streams == 1


@pytest.mark.asyncio
async def test_listen_off_gates_delivery(tmp_path: Path) -> None:
    async with emulated(tmp_path, OPEN) as (em, terminal, master, _):
        master.send(r.Listen(False))
        await asyncio.sleep(0.05)
        terminal.send(r.Transmit(1, b"unheard"))
        await terminal.wait_for(of(r.Transmitted))
        assert [x for x in await master.gather(0.1) if isinstance(x, r.Received)] == []
        master.send(r.Listen(True))
        await asyncio.sleep(0.05)
        terminal.send(r.Transmit(2, b"heard"))
        assert (await master.wait_for(of(r.Received))).frame == b"heard"
        assert em.terminal.counters.frames_lost == 1 and em.terminal.counters.frames_delivered == 1


@pytest.mark.asyncio
async def test_a_reset_sends_reset_and_clears_probing_listening_and_configuration(tmp_path: Path) -> None:
    async with emulated(tmp_path, OPEN) as (em, terminal, master, said):
        master.send(r.Configure(41_610_000, 40_520_000, 4800, 500.0))
        await master.wait_for(of(r.Status))  # a configure is answered with the modem's status
        master.send(r.Listen(False))
        master.send(r.ProbeStart(0.1, b"probe"))
        await terminal.wait_for(of(r.Received))
        assert em.master.configuration is not None and not em.master.listening
        assert em.command("reset master") is None
        reset = await master.wait_for(of(r.Reset))
        assert reset.reason == r.ResetReason.WATCHDOG and reset.modem_time_s < 0.01
        assert any("fault: reset master" in line for line in said)
        assert em.master.configuration is None and em.master.listening and em.master.probe_frame is None
        await asyncio.sleep(0.05)
        terminal.poll()
        terminal.seen.clear()
        assert [x for x in await terminal.gather(0.2) if isinstance(x, r.Received)] == []  # the probe stream died


@pytest.mark.asyncio
async def test_an_unplug_makes_the_path_disappear_and_come_back(tmp_path: Path) -> None:
    async with emulated(tmp_path, OPEN) as (em, terminal, master, said):
        link = tmp_path / "terminal"
        before = os.readlink(link)
        assert em.command("unplug terminal 3") is None  # 3 emulated seconds: 0.3 s of wall time
        assert not link.exists()
        # The host's open descriptor now fails, as an unplugged USB adapter does (EIO).
        with pytest.raises(serial.SerialException):
            for _ in range(3):
                terminal.port.read(1)
        terminal.close()
        deadline = asyncio.get_running_loop().time() + 2.0
        while not link.exists():
            assert asyncio.get_running_loop().time() < deadline, "the line did not come back"
            await asyncio.sleep(0.01)
        assert os.readlink(link) != before or os.path.exists(before)
        assert any("fault: unplug terminal 3 s" in line for line in said)
        again = Host(link)
        try:
            again.send(r.Transmit(3, FRAME))
            assert (await again.wait_for(of(r.Transmitted))).host_id == 3
            assert (await master.wait_for(of(r.Received))).frame == FRAME
        finally:
            again.close()
        assert em.terminal.counters.unplugs == 1


@pytest.mark.asyncio
async def test_malformed_unknown_and_misdirected_records_get_error_answers(tmp_path: Path) -> None:
    def framed(body: bytes) -> bytes:
        # CRC-16/IBM-3740 big-endian over head and body: binascii.crc_hqx with init 0xFFFF is that
        # CRC (field notes; check value 0x29B1); COBS with a zero delimiter (Cheshire and Baker 1999).
        whole = body + binascii.crc_hqx(body, 0xFFFF).to_bytes(2, "big")
        return cobs.encode(whole) + b"\x00"

    async with emulated(tmp_path, OPEN) as (em, terminal, _, _):
        terminal.port.write(framed(bytes((0x17,))))  # version 1, type 7: no such record
        assert await terminal.wait_for(of(r.ErrorAnswer)) == r.ErrorAnswer(r.ErrorCode.UNKNOWN_TYPE, 7)
        corrupt = bytearray(framed(bytes((0x16,))))  # a status query with one bit flipped
        corrupt[1] ^= 0x01  # on the line: its CRC no longer matches
        terminal.port.write(bytes(corrupt))
        assert await terminal.wait_for(of(r.ErrorAnswer)) == r.ErrorAnswer(r.ErrorCode.BAD_CRC, 0)
        terminal.port.write(framed(bytes((0x16, 0x00))))  # a status query with a stray byte
        assert (await terminal.wait_for(of(r.ErrorAnswer))).code == r.ErrorCode.MALFORMED
        terminal.send(r.Reset(1.0, r.ResetReason.OTHER))  # a modem-to-host record sent by the host
        assert await terminal.wait_for(of(r.ErrorAnswer)) == r.ErrorAnswer(r.ErrorCode.UNKNOWN_TYPE, r.RecordType.RESET)
        terminal.port.write(bytes(range(1, 200)) + b"\x00")  # line noise ending in a delimiter
        terminal.send(r.StatusQuery())  # and the modem still answers
        status = await terminal.wait_for(of(r.Status))
        assert status.pa == r.PaState.OFF and status.reflected_w == 0
        # Plausible health figures (common practice, no source): a modem indoors or in a
        # hut, a 12 V battery system.
        assert 0 < status.temperature_c < 60 and 11 < status.supply_v < 15
        c = em.terminal.counters
        assert c.errors >= 5 and c.error_answers >= 4 and c.errors_by_reason["bad_crc"] >= 1


@pytest.mark.asyncio
async def test_a_configure_that_differs_from_the_scenario_is_a_warning(tmp_path: Path) -> None:
    async with emulated(tmp_path, OPEN) as (em, terminal, _, said):
        terminal.send(r.Configure(40_520_000, 41_610_000, 4800, 300.0))  # the demo's own figures
        await terminal.wait_for(of(r.Status))
        assert not [line for line in said if "warning" in line]
        terminal.send(r.Configure(40_520_000, 41_610_000, 9600, 300.0))
        await terminal.wait_for(of(r.Status))
        warning = [line for line in said if "warning" in line]
        assert len(warning) == 1 and "bit rate 9600 bit/s (scenario 4800 bit/s)" in warning[0]
        assert em.terminal.configuration == r.Configure(40_520_000, 41_610_000, 9600, 300.0)


@pytest.mark.asyncio
async def test_a_stalled_modem_stops_answering_and_a_late_one_answers_late(tmp_path: Path) -> None:
    async with emulated(tmp_path, OPEN) as (em, terminal, _, _):
        em.command("stall terminal 2")  # 0.2 s of wall time
        terminal.send(r.StatusQuery())
        assert await terminal.gather(0.1) == []
        await asyncio.sleep(0.15)
        terminal.send(r.StatusQuery())
        await terminal.wait_for(of(r.Status))
        em.command("late terminal 3")  # Transmitted 3 emulated seconds (0.3 s of wall time) late
        loop = asyncio.get_running_loop()
        sent = loop.time()
        terminal.send(r.Transmit(9, FRAME))
        await terminal.wait_for(of(r.Transmitted))
        assert loop.time() - sent >= 0.25
        em.command("late terminal 0")
        sent = loop.time()
        terminal.send(r.Transmit(10, FRAME))
        await terminal.wait_for(of(r.Transmitted))
        assert loop.time() - sent < 0.2


@pytest.mark.asyncio
async def test_noise_costs_only_the_damaged_records(tmp_path: Path) -> None:
    async with emulated(tmp_path, OPEN) as (em, terminal, master, said):
        assert em.command("noise master 500") is None
        assert em.command("noise terminal 500 in") is None
        assert any("fault: noise master: 500 bytes to the host" in line for line in said)
        # The record after each burst of noise may be lost with it (COBS resynchronises
        # at the next delimiter): the Transmit after the inbound noise, the Received
        # after the outbound noise; the one after those gets through.
        for host_id in (4, 5, 6):
            terminal.send(r.Transmit(host_id, FRAME))
            await asyncio.sleep(0.05)
        assert (await master.wait_for(of(r.Received))).frame == FRAME
        assert (await terminal.wait_for(of(r.Transmitted))).host_id in (4, 5, 6)
        refused = master.stream.counters
        assert refused["bad_line_code"] + refused["overrun"] + refused["bad_crc"] + refused["unknown_type"] + refused["malformed"] > 0
        assert em.terminal.counters.errors > 0


@pytest.mark.asyncio
async def test_kiss_dialect_carries_frames_both_ways(tmp_path: Path) -> None:
    # KISS (Chepponis and Karn, 1987): FEND 0xC0 frames, FESC 0xDB escapes; C0 in data
    # goes as DB DC and DB as DB DD; the first byte is port << 4 | command, 0 = data.
    frame = bytes((0x01, 0xC0, 0x02, 0xDB, 0x03))
    async with emulated(tmp_path, OPEN, "kiss") as (em, terminal, master, _):
        terminal.port.write(bytes((0xC0, 0x00, 0x01, 0xDB, 0xDC, 0x02, 0xDB, 0xDD, 0x03, 0xC0)))
        got = await master.wait_for(of(r.Received))
        assert got.frame == frame and math.isnan(got.snr_db) and math.isnan(got.modem_time_s)
        master.send(r.Transmit(0, b"down"))
        assert (await terminal.wait_for(of(r.Received))).frame == b"down"
        terminal.port.write(bytes((0xC0, 0x01, 0x10, 0xC0)))  # TXDELAY: a KISS command, counted, not carried
        assert em.command("reset terminal") is None  # KISS has no reset record: nothing on the line
        assert [x for x in await terminal.gather(0.1) if not isinstance(x, r.Received)] == []
        assert em.terminal.counters.frames_delivered == 1 and em.master.counters.frames_delivered == 1


@pytest.mark.asyncio
async def test_the_seeded_fault_schedule_replays(tmp_path: Path) -> None:
    async def faults(seed: int, where: Path) -> list[str]:
        where.mkdir()
        async with emulated(where, OPEN, scale=200.0, faults_every=5.0, seed=seed) as (_, _, _, said):
            await asyncio.sleep(0.3)
        return [line.split("] ", 1)[1] for line in said if "fault:" in line]

    first, again, other = await faults(7, tmp_path / "a"), await faults(7, tmp_path / "b"), await faults(8, tmp_path / "c")
    n = min(len(first), len(again))
    assert n >= 3 and first[:n] == again[:n]
    assert first[: min(n, len(other))] != other[: min(n, len(other))]


@pytest.mark.asyncio
async def test_a_tcp_line_listens_on_loopback_only() -> None:
    lines = {role: TcpLine() for role in ROLES}
    em = ModemEmulator(channel(OPEN), SCENARIO, lines, {role: dialect("ionotrail") for role in ROLES}, time_scale=SCALE, say=lambda _: None)
    async with em:
        assert lines["terminal"].address.startswith("socket://127.0.0.1:")
        codec = dialect("ionotrail")
        streams = {role: codec.stream(Side.HOST) for role in ROLES}
        conns = {role: await asyncio.open_connection("127.0.0.1", lines[role].port) for role in ROLES}
        await asyncio.sleep(0.05)
        conns["terminal"][1].write(codec.encode(r.Transmit(5, FRAME)))
        got: list[Any] = []
        while not any(isinstance(x, r.Received) for x in got):
            got += streams["master"].feed(await asyncio.wait_for(conns["master"][0].read(4096), 2.0))
        assert [x.frame for x in got if isinstance(x, r.Received)] == [FRAME]
        for _, writer in conns.values():
            writer.close()


@pytest.mark.asyncio
async def test_a_station_can_serve_an_existing_serial_device(tmp_path: Path) -> None:
    # A development board on a USB-serial adapter, stood in for by a pty pair: the
    # emulator opens the device; the board (the test) holds the other end.
    board, device = os.openpty()
    tty.setraw(board)
    os.set_blocking(board, False)
    lines = {"terminal": DeviceLine(os.ttyname(device)), "master": PtyLine(tmp_path / "master")}
    em = ModemEmulator(channel(OPEN), SCENARIO, lines, {role: dialect("ionotrail") for role in ROLES}, time_scale=SCALE, say=lambda _: None)
    codec = dialect("ionotrail")
    try:
        async with em:
            master = Host(tmp_path / "master")
            try:
                os.write(board, codec.encode(r.Transmit(11, FRAME)))
                assert (await master.wait_for(of(r.Received))).frame == FRAME
                stream, got = codec.stream(Side.HOST), []
                deadline = asyncio.get_running_loop().time() + 2.0
                while not got and asyncio.get_running_loop().time() < deadline:
                    await asyncio.sleep(0.01)
                    with contextlib.suppress(BlockingIOError):
                        got = [x for x in stream.feed(os.read(board, 4096)) if isinstance(x, r.Transmitted)]
                assert got == [r.Transmitted(11, True, 320 / 4800)]
            finally:
                master.close()
    finally:
        os.close(board)
        os.close(device)


def test_emulate_help_carries_the_safety_note(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit):
        main(["emulate", "--help"])
    out = capsys.readouterr().out
    assert "safety:" in out and "--time-scale" in out and "--faults-every" in out


def test_emulate_runs_for_its_duration_and_prints_paths_and_summaries(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    code = main(["emulate", "--hours", "1", "--time-scale", "100", "--duration", "20", "--run-dir", str(tmp_path)])
    out = capsys.readouterr().out
    assert code == 0
    assert f"terminal modem: {tmp_path / 'terminal'}" in out and f"master modem: {tmp_path / 'master'}" in out
    assert "ended: duration reached" in out
    assert out.count("frames carried") == 2
    assert not (tmp_path / "terminal").exists()  # the lines are gone with the emulator


def test_emulate_refuses_bad_options(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["emulate", "--dialect", "morse"]) == 2
    assert "unknown dialect 'morse'" in capsys.readouterr().err
    assert main(["emulate", "--time-scale", "0"]) == 2
    assert main(["emulate", "--dialect", "kiss", "--master-dialect", "kiss"]) == 2
