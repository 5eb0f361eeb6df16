"""The soak's ledger and verdict: exactly-once is checked by content, across id wrap-around,
and a soak that delivers nothing fails."""

from __future__ import annotations

import socket
import subprocess
import sys
import threading
from collections.abc import Iterator

import pytest
from ionotrail.harness.emulators.master import DeliveryRecord
from ionotrail.harness.runners.soak import SoakLedger
from ionotrail.terminal.delivery.sender import Priority
from ionotrail.terminal.service import MessageQueued
from ionotrail.terminal.wire.crc import crc32c


def queue_and_deliver(ledger: SoakLedger, serial: int, message_id: int, delivered_crc: int | None = None) -> None:
    payload = b"reading %d" % serial
    ledger.queued(0.0, MessageQueued(message_id, float(serial), payload, Priority.ROUTINE))
    crc = crc32c(payload) if delivered_crc is None else delivered_crc
    ledger.delivery(DeliveryRecord(2609, message_id, float(serial), serial + 1.0, len(payload), crc))


def test_messages_that_share_a_wrapped_id_are_not_duplicates() -> None:
    ledger = SoakLedger()
    for serial in range(65536 + 10):  # 16-bit ids wrap after 65,536 messages
        queue_and_deliver(ledger, serial, serial % 65536)
    assert (len(ledger.offered), len(ledger.delivered), ledger.duplicated) == (65546, 65546, 0)


def test_a_second_copy_is_a_duplicate_and_altered_bytes_are_unexpected() -> None:
    ledger = SoakLedger()
    queue_and_deliver(ledger, 1, 5)
    ledger.delivery(DeliveryRecord(2609, 5, 1.0, 3.0, 9, crc32c(b"reading 1")))
    queue_and_deliver(ledger, 2, 6, delivered_crc=0xDEADBEEF)
    assert ledger.duplicated == 1 and ledger.unexpected == 1 and len(ledger.delivered) == 1


@pytest.fixture
def deaf_modems() -> Iterator[tuple[str, str]]:
    """Two loopback TCP 'modems' that read everything and never answer."""
    servers = [socket.create_server(("127.0.0.1", 0)) for _ in range(2)]
    stop = threading.Event()

    def serve(server: socket.socket) -> None:
        server.settimeout(0.2)
        conns = []
        while not stop.is_set():
            try:
                conn, _ = server.accept()
                conn.settimeout(0.05)
                conns.append(conn)
            except TimeoutError:
                pass
            for conn in conns:
                try:
                    conn.recv(4096)
                except (TimeoutError, OSError):
                    pass
        for conn in conns:
            conn.close()
        server.close()

    threads = [threading.Thread(target=serve, args=(s,), daemon=True) for s in servers]
    for thread in threads:
        thread.start()
    yield tuple(f"socket://127.0.0.1:{s.getsockname()[1]}" for s in servers)  # type: ignore[misc]
    stop.set()
    for thread in threads:
        thread.join(timeout=5)


def test_a_soak_that_delivers_nothing_fails(deaf_modems: tuple[str, str]) -> None:
    terminal, master = deaf_modems
    run = subprocess.run(
        [sys.executable, "-m", "ionotrail", "soak", "--terminal", terminal, "--master", master, "--duration", "4", "--drain", "2", "--every", "1"],
        capture_output=True, text=True, timeout=120, check=False,
    )
    assert run.returncode == 1, run.stdout + run.stderr
    assert "delivered 0" in run.stdout
