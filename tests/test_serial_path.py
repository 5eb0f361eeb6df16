"""The serial path end to end, over real pseudo-terminals: the modem emulator
(``ionotrail emulate``, a subprocess) between the reference terminal and the
master on SerialPorts, faults injected on the emulator's stdin; and a terminal
that is not ours, speaking the host-modem interface from a script of its own.

The channel is the demo link with more transmitter power and antenna gain, so
that openings come every few seconds in real time (``ionotrail channel`` with
the same settings: about 900 bursts an hour).
"""

from __future__ import annotations

import asyncio
import contextlib
import io
import json
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
from ionotrail.harness.channel import scenario as scenarios
from ionotrail.harness.runners.soak import SOAK_KEYS, soak
from ionotrail.terminal.limits import Limits
from ionotrail.terminal.wire.crc import crc32c

BUSY_LINK = ["terminal.tx_power_w=2000", "master.tx_power_w=5000", "terminal.gain_dbi=14", "master.gain_dbi=16"]
FOREIGN = Path(__file__).resolve().parent / "foreign" / "terminal_script.py"


@contextlib.contextmanager
def emulator(run_dir: Path, *extra: str, duration: float = 300.0) -> Iterator[subprocess.Popen[str]]:
    sets = [arg for item in BUSY_LINK for arg in ("--set", item)]
    command = [sys.executable, "-m", "ionotrail", "emulate", "--run-dir", str(run_dir), "--duration", str(duration), *sets, *extra]
    process = subprocess.Popen(command, stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    try:
        deadline = time.monotonic() + 30
        while not ((run_dir / "terminal").exists() and (run_dir / "master").exists()):
            assert process.poll() is None, process.stdout.read() if process.stdout else ""
            assert time.monotonic() < deadline, "the emulator did not publish its lines"
            time.sleep(0.05)
        yield process
    finally:
        process.kill()
        process.wait(timeout=10)


def fault(process: subprocess.Popen[str], line: str) -> None:
    assert process.stdin is not None
    process.stdin.write(line + "\n")
    process.stdin.flush()


def flat(report: dict[str, object], prefix: str = "") -> dict[str, object]:
    out: dict[str, object] = {}
    for key, value in report.items():
        if isinstance(value, dict):
            out |= flat(value, f"{prefix}{key}.")
        else:
            out[prefix + key] = value
    return out


MID_BURST = "mid-burst "
"""A fault prefixed so waits, from its time on, for the terminal to put a fragment on
the air (read from the trace), and strikes right after it: in the middle of a burst."""


def run_soak(run_dir: Path, faults: list[tuple[float, str]], process: subprocess.Popen[str], **options: object) -> dict[str, object]:
    scenario = scenarios.load(None, BUSY_LINK)
    trace = options.get("trace")

    async def next_fragment_sent() -> None:
        assert isinstance(trace, io.StringIO), "a mid-burst fault reads the trace"
        seen = len(trace.getvalue())
        while True:
            for line in trace.getvalue()[seen:].splitlines():
                item = json.loads(line)
                if item["station"] == "terminal" and item["outcome"] == "sent" and item["hex"].startswith("12"):
                    return  # a fragment (frame type 2) just left the terminal
            await asyncio.sleep(0.002)

    async def main() -> dict[str, object]:
        async def inject() -> None:
            started = time.monotonic()
            for at, line in faults:
                await asyncio.sleep(max(0.0, at - (time.monotonic() - started)))
                if line.startswith(MID_BURST):
                    await asyncio.wait_for(next_fragment_sent(), 30)
                    line = line.removeprefix(MID_BURST)
                fault(process, line)

        injector = asyncio.create_task(inject())
        report = await soak(scenario, str(run_dir / "terminal"), str(run_dir / "master"), **options)  # type: ignore[arg-type]
        await injector
        return report

    return asyncio.run(main())


def test_messages_cross_the_emulator_exactly_once_through_an_unplug_and_a_reset_mid_burst_and_line_noise(tmp_path: Path) -> None:
    trace = io.StringIO()
    with emulator(tmp_path) as process:
        faults = [(4.0, MID_BURST + "unplug terminal 2"), (9.0, MID_BURST + "reset master"), (12.0, "noise 10000")]
        report = run_soak(tmp_path, faults, process, duration_s=18.0, drain_s=40.0, report_every_s=1.0, trace=trace)
    m = report["messages"]
    assert isinstance(m, dict)
    assert set(SOAK_KEYS) <= set(flat(report))
    assert m["offered"] >= 15 and m["delivered"] == m["offered"], report
    assert m["lost"] == 0 and m["duplicated"] == 0 and m["pending"] == 0
    assert flat(report)["serial.reconnects"] >= 1, "the unplugged terminal modem was reopened"
    assert flat(report)["modem.resets"] >= 1, "the master modem's reset was seen and its settings restored"
    assert flat(report)["serial.errors"] > 0, "the noise cost damaged records, counted"
    seen = {(line["station"], line["direction"]) for line in map(json.loads, trace.getvalue().splitlines())}
    assert seen == {("terminal", "in"), ("terminal", "out"), ("master", "in"), ("master", "out")}


@pytest.mark.parametrize(
    "reports",
    [pytest.param(24, id="six-hours"), pytest.param(96, id="a-day", marks=pytest.mark.thorough)],
)
def test_the_kiss_dialect_carries_the_gauges_reports(reports: int, tmp_path: Path) -> None:
    # The demo gauge reports every 15 minutes (96 a day); here 0.4 s apart, into a queue
    # that holds them all, so that what is measured is the dialect, not the queue.
    with emulator(tmp_path, "--dialect", "kiss") as process:
        report = run_soak(
            tmp_path, [], process, duration_s=0.4 * reports, drain_s=150.0, report_every_s=0.4, dialect_name="kiss",
            limits=Limits(max_queued_messages=128),
        )
    m = report["messages"]
    assert isinstance(m, dict)
    assert m["offered"] >= reports
    assert m["delivered"] == m["offered"] and m["lost"] == 0 and m["duplicated"] == 0, json.dumps(report)


def test_a_terminal_that_is_not_ours_reaches_the_master(tmp_path: Path) -> None:
    message = b"foreign gauge: level 1.42 m"
    deliveries = tmp_path / "deliveries.jsonl"
    sets = [arg for item in BUSY_LINK for arg in ("--set", item)]
    with emulator(tmp_path / "run"):
        master = subprocess.Popen(
            [sys.executable, "-m", "ionotrail", "master", "--port", str(tmp_path / "run" / "master"), "--deliveries", str(deliveries),
             "--duration", "25", *sets],
            stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
        )
        foreign = subprocess.run(
            [sys.executable, str(FOREIGN), str(tmp_path / "run" / "terminal"), "0x0A31", "7", message.hex(), "20"],
            capture_output=True, text=True, timeout=60, check=False,
        )
        master_out, _ = master.communicate(timeout=60)
    assert foreign.returncode == 0, foreign.stdout + foreign.stderr
    records = [json.loads(line) for line in deliveries.read_text(encoding="utf-8").splitlines()]
    assert [(r["terminal"], r["message_id"], r["size"], r["crc32c"]) for r in records] == [
        (0x0A31, 0, len(message), f"0x{crc32c(message):08x}")
    ], master_out
    assert "1 messages delivered" in master_out


@pytest.mark.parametrize("option", ["--duration 0", "--every -1", "--dialect morse"])
def test_soak_refuses_bad_options_in_one_line(option: str, tmp_path: Path) -> None:
    run = subprocess.run(
        [sys.executable, "-m", "ionotrail", "soak", "--terminal", str(tmp_path / "t"), "--master", str(tmp_path / "m"), *option.split()],
        capture_output=True, text=True, timeout=60, check=False,
    )
    assert run.returncode == 2
    assert len(run.stderr.strip().splitlines()) == 1 and option.split()[0] in run.stderr
