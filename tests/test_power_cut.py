"""Power cuts, as real processes killed with SIGKILL at seeded random moments.

* A torn write: a child commits large batches to an SQLite store in a loop and
  is killed, most often inside a transaction; each batch must be wholly there
  or wholly absent (how SQLite itself is tested, at process level: sqlite.org,
  "How SQLite Is Tested", crash testing).
* ``ionotrail serve --outbox`` and ``ionotrail master --state`` over the modem
  emulator (``ionotrail emulate``), each killed and restarted again and again
  while the other runs on: every message the terminal accepted is delivered
  exactly once, and nothing is delivered twice.  Both hold keys, and every
  master life starts a key rotation over the air (``--rotate-keys``), so
  rotations are cut at random moments too: at the end both ends agree on the
  epoch.

The default suite kills each side 10 times; the ``thorough``-marked cases
(run with ``--hypothesis-profile=thorough``) 100 times.
"""

from __future__ import annotations

import contextlib
import json
import random
import signal
import sqlite3
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
from ionotrail.harness.cli.keys import write_key_file
from ionotrail.terminal.auth.authenticator import MasterAuthenticator, TerminalAuthenticator
from ionotrail.terminal.auth.keys import SiteSecret
from ionotrail.terminal.errors import DecodeError
from ionotrail.terminal.limits import MESSAGE_CRC_BYTES, MESSAGE_ID_BITS
from ionotrail.terminal.outbox import records
from ionotrail.terminal.outbox.journal import parse_delivery
from ionotrail.terminal.stores.sqlite import SqliteStore
from ionotrail.terminal.wire.crc import crc32c

BUSY_LINK = ["terminal.tx_power_w=2000", "master.tx_power_w=5000", "terminal.gain_dbi=14", "master.gain_dbi=16"]
SETS = [arg for item in BUSY_LINK for arg in ("--set", item)]

WRITER = r"""
import sys
from ionotrail.terminal.outbox.store import Batch
from ionotrail.terminal.stores.sqlite import SqliteStore

store = SqliteStore(sys.argv[1])
n = max([int(v[:8]) for v in store.load().values()] or [0])
while True:
    n += 1
    stamp = b"%08d" % n
    # 40 records of 4 KiB, each naming its batch: larger than a page, so a batch spans many.
    batch = Batch({f"r{k}": stamp + bytes([k]) * 4088 for k in range(40)}, appends=(stamp,))
    print("begin", n, flush=True)
    store.commit(batch)
    print("done", n, flush=True)
"""


KILLS = [pytest.param(10, id="10-kills"), pytest.param(100, id="100-kills", marks=pytest.mark.thorough)]


@pytest.mark.parametrize("kills", KILLS)
def test_a_torn_write_leaves_each_batch_wholly_there_or_wholly_absent(kills: int, tmp_path: Path) -> None:
    path = tmp_path / "torn.db"
    rng = random.Random(20261202)
    inside = 0
    for _ in range(kills):
        out = tmp_path / "writer.out"
        with open(out, "w") as sink:
            child = subprocess.Popen([sys.executable, "-c", WRITER, str(path)], stdout=sink)
            deadline = time.monotonic() + 30
            while "done" not in out.read_text():  # the first commit of this life is through
                assert child.poll() is None and time.monotonic() < deadline, "the writer did not start"
                time.sleep(0.01)
            time.sleep(rng.uniform(0.0, 0.3))
            child.send_signal(signal.SIGKILL)
            child.wait()
        lines = out.read_text().split()
        events = [(lines[k], int(lines[k + 1])) for k in range(0, len(lines) - 1, 2)]
        begun = max(n for word, n in events if word == "begin")
        done = max(n for word, n in events if word == "done")
        inside += begun > done
        store = SqliteStore(path)
        records = store.load()
        stamps = {value[:8] for value in records.values()}
        assert len(stamps) == 1, f"records of several batches after a kill: {sorted(stamps)}"
        assert all(value == value[:8] + bytes([int(key[1:])]) * 4088 for key, value in records.items())
        assert len(records) == 40
        stored = int(stamps.pop())
        assert stored in (done, begun), (stored, done, begun)  # the last commit returned, or the one under way made it whole
        log = [int(entry) for _, entry in store.log_after(0, 1 << 20)]
        assert log == list(range(1, stored + 1)), "the log lost or repeated an entry"
        store.close()
    print(f"\n{kills} kills, {inside} inside a transaction; every batch whole or absent")
    assert inside >= kills // 3, f"only {inside} of {kills} kills landed inside a transaction"


# --- whole stations, killed -------------------------------------------------------------------


@contextlib.contextmanager
def emulator(run_dir: Path) -> Iterator[subprocess.Popen[str]]:
    command = [sys.executable, "-m", "ionotrail", "emulate", "--run-dir", str(run_dir), "--duration", "3600", *SETS]
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


class Station:
    """``ionotrail serve`` or ``ionotrail master`` as a subprocess, killed and started again."""

    def __init__(self, role: str, run_dir: Path, work: Path) -> None:
        self.role, self.work = role, work
        port = str(run_dir / role)
        if role == "terminal":
            self.command = [
                sys.executable, "-m", "ionotrail", "serve", "--port", port, "--outbox", str(work / "outbox.db"),
                "--accepted", str(work / "accepted.jsonl"), "--every", "0.5", "--keys", str(work / "gauge.key"), *SETS,
            ]  # fmt: skip
        else:
            self.command = [
                sys.executable, "-m", "ionotrail", "master", "--port", port, "--state", str(work / "master.db"),
                "--deliveries", str(work / "deliveries.jsonl"), "--keys", str(work / "site.key"), "--rotate-keys", *SETS,
            ]  # fmt: skip
        self.process: subprocess.Popen[bytes] | None = None
        self.lives = 0

    def start(self) -> None:
        log = open(self.work / f"{self.role}.log", "ab")  # noqa: SIM115 - the child owns it
        self.process = subprocess.Popen(self.command, stdout=log, stderr=subprocess.STDOUT)
        log.close()
        self.lives += 1

    def kill(self) -> None:
        assert self.process is not None
        assert self.process.poll() is None, f"{self.role} died by itself: {(self.work / f'{self.role}.log').read_text()[-2000:]}"
        self.process.send_signal(signal.SIGKILL)
        self.process.wait()

    def stop(self) -> str:
        assert self.process is not None
        self.process.send_signal(signal.SIGINT)
        self.process.wait(timeout=30)
        return (self.work / f"{self.role}.log").read_text()


def outbox_empty(path: Path) -> bool:
    if not path.exists():
        return False
    db = sqlite3.connect(path)
    try:
        return not db.execute("SELECT count(*) FROM records WHERE key LIKE 'message/%'").fetchone()[0]
    except sqlite3.OperationalError:
        return False
    finally:
        db.close()


def kept_messages(path: Path) -> set[tuple[int, int]]:
    """(wire id, CRC-32C of the payload) of every message in a dead terminal's outbox:
    each is accepted, whether or not its --accepted line was written before the kill."""
    if not path.exists():
        return set()
    db = sqlite3.connect(path)
    try:
        rows = db.execute("SELECT value FROM records WHERE key LIKE 'message/%'").fetchall()
    except sqlite3.OperationalError:  # killed before its first commit made the tables
        return set()
    finally:
        db.close()
    kept = set()
    for (value,) in rows:
        message = records.MESSAGE.parse(value)
        wire_id = message.seq & ((1 << MESSAGE_ID_BITS) - 1)
        kept.add((wire_id, crc32c(message.sealed[:-MESSAGE_CRC_BYTES])))
    return kept


def rotation_done(work: Path, site: SiteSecret) -> tuple[int, int] | None:
    """(master's epoch, terminal's epoch) once both stores agree and no rotation is under way."""
    try:
        terminal = TerminalAuthenticator.restore(SqliteStore(work / "outbox.db").load())
        master = MasterAuthenticator.restore(site, SqliteStore(work / "master.db").load())
    except (DecodeError, sqlite3.Error):
        return None
    if master.rotating(0x0A31) or master.epoch(0x0A31) != terminal.epoch:
        return None
    return master.epoch(0x0A31), terminal.epoch


@pytest.mark.parametrize("kills_each", KILLS)
def test_killed_stations_lose_nothing_and_deliver_nothing_twice(kills_each: int, tmp_path: Path) -> None:
    rng = random.Random(1202)
    run_dir, work = tmp_path / "run", tmp_path / "work"
    work.mkdir()
    site = SiteSecret(bytes(range(32)))
    write_key_file(work / "site.key", site)
    write_key_file(work / "gauge.key", site.root(0x0A31))
    with emulator(run_dir):
        terminal, master = Station("terminal", run_dir, work), Station("master", run_dir, work)
        master.start()
        terminal.start()
        kills = {"terminal": 0, "master": 0}
        kept: set[tuple[int, int]] = set()  # messages found in the outbox after a kill of the terminal
        while min(kills.values()) < kills_each:
            time.sleep(rng.uniform(0.8, 3.0))  # a moment in the station's life: starting up, idle, mid-burst, mid-commit
            role = rng.choice([r for r, n in kills.items() if n < kills_each])
            station = terminal if role == "terminal" else master
            station.kill()
            kills[role] += 1
            if role == "terminal":
                kept |= kept_messages(work / "outbox.db")
            station.start()
        time.sleep(1.0)
        terminal.kill()  # the last life stops producing; the next one only drains what was kept
        terminal.command += ["--every", "100000"]
        terminal.start()
        deadline = time.monotonic() + 240
        while not outbox_empty(work / "outbox.db"):
            assert time.monotonic() < deadline, "the outbox did not drain"
            time.sleep(1.0)
        deadline = time.monotonic() + 120  # every master life began a key rotation: the last one completes
        while not rotation_done(work, site):
            assert time.monotonic() < deadline, "the last key rotation did not complete"
            time.sleep(1.0)
        time.sleep(2.0)  # the master's last commits and probes
        terminal_out, master_out = terminal.stop(), master.stop()
    accepted = [json.loads(line) for line in (work / "accepted.jsonl").read_text().splitlines()]
    store = SqliteStore(work / "master.db")
    delivered = [parse_delivery(p, e) for p, e in store.log_after(0, 1 << 30)]
    keys = [(d.message_id, crc32c(d.payload)) for d in delivered]
    assert len(keys) == len(set(keys)), "a message was delivered twice"
    missing = {(a["message_id"], int(a["crc32c"], 16)) for a in accepted} - set(keys)
    assert not missing, f"accepted and never delivered: {sorted(missing)}"
    # Messages committed an instant before a kill have no line in --accepted: the
    # outbox, read after each kill, has them, and they too are delivered.
    unlisted = kept - {(a["message_id"], int(a["crc32c"], 16)) for a in accepted}
    assert not kept - set(keys), f"kept in the outbox and never delivered: {sorted(kept - set(keys))}"
    exported = [json.loads(line) for line in (work / "deliveries.jsonl").read_text().splitlines()]
    assert [(r["message_id"], int(r["crc32c"], 16)) for r in exported] == keys, "the deliveries file differs from the log"
    epochs = rotation_done(work, site)
    assert epochs is not None and epochs[0] >= 1, "keys rotated over the air through the kills, both ends agreeing"
    print(
        f"\nkills: terminal {kills['terminal']}, master {kills['master']}; key epoch {epochs[0]} at both ends; accepted {len(accepted)} (lines), "
        f"delivered {len(delivered)}, lost 0, duplicated 0; {len(kept)} found in the outbox after kills, {len(unlisted)} of them without a line; {terminal_out.strip().splitlines()[-1]}; {master_out.strip().splitlines()[-1]}"
    )
    assert len(delivered) >= len(accepted) >= 2 * kills_each  # the runs carried traffic worth the name


@pytest.mark.parametrize("option", ["--outbox", "--state"])
def test_a_store_that_cannot_be_used_is_refused_in_one_line(option: str, tmp_path: Path) -> None:
    command = "serve" if option == "--outbox" else "master"
    not_a_store = tmp_path / "notes.txt"
    not_a_store.write_text("field notes, not a database\n" * 200)
    for path, expected in (
        (tmp_path / "missing" / "x.db", "cannot create the store (No such file or directory)"),
        (not_a_store, "not a store"),
    ):
        run = subprocess.run(
            [sys.executable, "-m", "ionotrail", command, "--port", str(tmp_path / "nowhere"), option, str(path)],
            capture_output=True, text=True, timeout=60, check=False,
        )  # fmt: skip
        assert run.returncode == 2, run.stderr
        lines = run.stderr.strip().splitlines()
        assert len(lines) == 1 and f"{option} {path}" in lines[0] and expected in lines[0], run.stderr
