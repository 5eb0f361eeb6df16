"""Progress of a long run: a throttled bar on a terminal's stderr, nothing off a terminal.

The command runs in a subprocess with its stderr on a pseudo-terminal
(os.openpty), as a person at a terminal would see it.  The bar it replaced
redrew once every 600 simulated seconds: 432 redraws for three simulated days
(measured on that bar: 433 carriage returns, 36,565 bytes), whatever the wall
time.
"""

from __future__ import annotations

import fcntl
import os
import re
import select
import struct
import subprocess
import sys
import termios
import time

from ionotrail.harness.cli.common import REDRAW_INTERVAL_S, progress_bar

OLD_REDRAWS_3_DAYS = 3 * 86400 // 600  # the old bar: one redraw per progress call, every 600 simulated seconds


def run_on_a_terminal(*args: str, columns: int = 0) -> tuple[bytes, str, float, int]:
    """stderr on a pseudo-terminal (of ``columns``, or never sized): (what it got, stdout, wall seconds, exit status)."""
    master, slave = os.openpty()
    if columns:
        fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 24, columns, 0, 0))
    start = time.monotonic()
    proc = subprocess.Popen(
        [sys.executable, "-m", "ionotrail", *args], stdout=subprocess.PIPE, stderr=slave, stdin=subprocess.DEVNULL
    )
    os.close(slave)
    got = bytearray()
    deadline = start + 120
    try:
        while time.monotonic() < deadline:
            ready, _, _ = select.select([master], [], [], 1.0)
            if not ready:
                if proc.poll() is not None:
                    break
                continue
            try:
                chunk = os.read(master, 65536)
            except OSError:  # EIO: every writer closed the terminal
                break
            if not chunk:
                break
            got += chunk
        out = proc.stdout.read().decode() if proc.stdout else ""
        status = proc.wait(timeout=30)
    finally:
        os.close(master)
        if proc.poll() is None:
            proc.kill()
    return bytes(got), out, time.monotonic() - start, status


def redraws(terminal: bytes) -> int:
    """Carriage returns that start a redraw (the terminal turns each newline into CR LF)."""
    return terminal.count(b"\r") - terminal.count(b"\r\n")


def test_simulate_on_a_terminal_redraws_a_few_times_a_second() -> None:
    terminal, out, wall, status = run_on_a_terminal("simulate", "--days", "3", columns=120)
    assert status == 0, terminal
    assert "simulated 3d 00:00:00" in out
    text = terminal.decode()
    drawn = redraws(terminal)
    # A redraw at most every REDRAW_INTERVAL_S of wall time, plus the first and the closing one.
    assert 1 <= drawn <= wall / REDRAW_INTERVAL_S + 2, (drawn, wall)
    assert drawn < OLD_REDRAWS_3_DAYS and len(terminal) < 36_565, (drawn, len(terminal))  # unless 36 times slower
    # The run's bar closes on its last figures, then the oracle bound's pass over the period has its own.
    closing = [line.split("\r")[-1] for line in text.replace("\r\n", "\n").split("\n") if line]
    run, bound = closing[-2], closing[-1]
    # The closing line: all of the period, elapsed and left, the rate in simulated time, what was delivered.
    assert run.startswith("simulating 100%|"), run
    assert "| 3d 00:00 of 3d 00:00 [" in run, run
    assert re.search(r"\[\d\d:\d\d<\d\d:\d\d, [\d,.]+ (days/s|s/day)\] [\d,]+ delivered$", run), run
    assert bound.startswith("oracle bound 100%|") and "| 3d 00:00 of 3d 00:00 [" in bound, bound


def test_simulate_off_a_terminal_prints_only_the_summary() -> None:
    result = subprocess.run(
        [sys.executable, "-m", "ionotrail", "simulate", "--hours", "6"], capture_output=True, timeout=120, check=False
    )
    assert result.returncode == 0, result.stderr
    assert result.stderr == b""
    assert result.stdout.decode().startswith("Haldane Creek to Kestrel Ridge (demo)")


def test_quiet_draws_no_bar_even_on_a_terminal() -> None:
    terminal, out, _, status = run_on_a_terminal("simulate", "--hours", "6", "-q")
    assert status == 0 and terminal == b"", terminal
    assert "simulated 06:00:00" in out


def test_channel_draws_the_same_bar_while_generating_trails() -> None:
    terminal, _, wall, status = run_on_a_terminal("channel", "--days", "2")
    assert status == 0, terminal
    assert 1 <= redraws(terminal) <= wall / REDRAW_INTERVAL_S + 2
    # Never sized, the terminal is taken as 80 columns: the line fits them.
    last = terminal.decode().replace("\r\n", "\n").split("\r")[-1]
    assert last.startswith("generating trails 100%|") and "| 2d 00:00 of 2d 00:00 [" in last, last
    assert len(last.rstrip("\n")) <= 80, last


def test_progress_bar_is_none_off_a_terminal_or_when_quiet() -> None:
    # Under pytest stderr is captured, not a terminal.
    assert not sys.stderr.isatty()
    with progress_bar("simulating", 86400.0) as show:
        assert show is None
    with progress_bar("simulating", 86400.0, quiet=True) as show:
        assert show is None
