"""The durable outbox and the master's journal: nothing accepted is lost and
nothing is delivered twice across reboots of either end, ids never repeat, a
confirmed byte is never sent again after a reboot, and the writes per message
stay within the design target (two per routine message sent in one opening).

Reboots here fall between commits; tests/test_power_cut.py kills real processes
at arbitrary moments, and checks a torn transaction on disk."""

from __future__ import annotations

import asyncio
import os
import random
import sqlite3
import stat
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st
from ionotrail.harness.runners.vtime import VirtualTimeLoop
from ionotrail.harness.testing.faults import FAIR, FaultSchedule, FaultyChannel
from ionotrail.terminal.delivery.reassembly import Delivery, Reassembler
from ionotrail.terminal.delivery.sender import Priority, Sender
from ionotrail.terminal.errors import DecodeError, UsageError
from ionotrail.terminal.limits import FRAGMENT_OVERHEAD_BYTES, ID_RESERVATION, Limits
from ionotrail.terminal.link.policy import Fixed
from ionotrail.terminal.link.terminal import Link
from ionotrail.terminal.outbox import records
from ionotrail.terminal.outbox.journal import MasterJournal, parse_delivery
from ionotrail.terminal.outbox.outbox import COUNTER_KEY, Outbox, message_key
from ionotrail.terminal.outbox.store import Batch, Store, StoreError
from ionotrail.terminal.ports import Port
from ionotrail.terminal.service import MessageAbandoned, MessageQueued, TerminalService
from ionotrail.terminal.stores.memory import MemoryStore
from ionotrail.terminal.stores.sqlite import SqliteStore
from ionotrail.terminal.wire import Ack, AckBlock, Fragment, decode, encode
from ionotrail.terminal.wire.formats import ReplyStatus

TERMINAL, MASTER = 0x0A31, 7
SECONDS_PER_BYTE = 8 / 4800.0


class Terminal:
    """A sender behind a durable outbox, rebooted by building it again from its store."""

    def __init__(self, store: Store, limits: Limits, now: float) -> None:
        self.store, self.limits = store, limits
        self.sender = Sender(TERMINAL, MASTER, limits=limits)
        self.outbox = Outbox(self.sender)
        self.kept = self.outbox.restore(store.load(), now)
        # What the master had confirmed, as the records hold it: never to be sent again.
        self.confirmed = {seq: acked for seq, (_, _, acked) in self.sender.kept().items()}

    def accept(self, payload: bytes, priority: Priority, now: float) -> int:
        batch = self.outbox.accept(payload, priority, now)
        self.store.commit(batch)
        return self.outbox.committed(batch)

    def keep(self) -> None:
        batch = self.outbox.changes()
        if batch:
            self.store.commit(batch)
            self.outbox.committed(batch)


class Master:
    """A reassembler behind a journal, rebooted the same way; the store's log is the sink."""

    def __init__(self, store: MemoryStore, limits: Limits, now: float) -> None:
        self.store = store
        self.reassembler = Reassembler(limits)
        self.journal = MasterJournal(self.reassembler)
        self.journal.restore(store.load(), now)

    def receive(self, fragment: Fragment, now: float) -> AckBlock:
        reception = self.reassembler.receive(fragment, now)
        batch = self.journal.changes([reception.delivery] if reception.delivery else [])
        if batch:
            self.store.commit(batch)  # before the acknowledgement leaves
            self.journal.committed(batch)
        return reception.ack

    def delivered(self) -> list[Delivery]:
        return [parse_delivery(p, e) for p, e in self.store.log_after(0, 1 << 30)]


def opening(terminal: Terminal, master: Master, budget: int, now: float, up: FaultyChannel, down: FaultyChannel) -> float:
    """One opening: fragments up through ``up``, acknowledgements down through ``down``."""
    sender = terminal.sender
    sender.presume_lost(now)
    sender.outcomes.clear()
    frames: list[bytes] = []
    while budget > FRAGMENT_OVERHEAD_BYTES:
        fragment = sender.next_fragment(budget - FRAGMENT_OVERHEAD_BYTES, now, SECONDS_PER_BYTE)
        if fragment is None:
            break
        for seq, acked in terminal.confirmed.items():  # a byte the records held as confirmed never goes again
            if (seq & 0xFFFF) == fragment.message_id:
                assert not any(s < fragment.end and fragment.offset < e for s, e in acked if fragment.end - fragment.offset > 1 or s != fragment.offset), (
                    seq, acked, fragment.offset, fragment.end,
                )  # fmt: skip
        frame = encode(fragment)
        frames.append(frame)
        budget -= len(frame)
        now += len(frame) * SECONDS_PER_BYTE
    acks: dict[int, AckBlock] = {}
    for frame in up.carry(frames):
        try:
            fragment = decode(frame)
        except DecodeError:
            continue
        assert isinstance(fragment, Fragment)
        ack = master.receive(fragment, now)
        acks[ack.message_id] = ack
    issued = now
    for frame in down.carry([encode(Ack(MASTER, block)) for block in acks.values()]):
        try:
            ack_frame = decode(frame)
        except DecodeError:
            continue
        assert isinstance(ack_frame, Ack)
        now += len(frame) * SECONDS_PER_BYTE
        sender.on_ack(ack_frame.ack, now, issued=issued)
        terminal.keep()
    return now


KINDS = ("accept", "open", "reboot-terminal", "reboot-master")


@given(
    seed=st.integers(0, 2**32),
    weights=st.tuples(st.integers(1, 6), st.integers(1, 6), st.integers(0, 2), st.integers(0, 2)),
    length=st.integers(20, 160),
)
def test_reboots_of_either_end_lose_nothing_and_deliver_nothing_twice(seed: int, weights: tuple[int, ...], length: int) -> None:
    """Random runs (accepting messages, openings through a lossy, duplicating,
    reordering channel, reboots of either end between commits), then a fair
    channel until the outbox is empty: every accepted message delivered once."""
    limits = Limits(max_queued_messages=8)
    rng = random.Random(seed)
    lossy = FaultSchedule(loss=0.3, corrupt=0.05, duplicate=0.1, reorder=0.2)
    up, down = FaultyChannel(lossy, random.Random(rng.random())), FaultyChannel(lossy, random.Random(rng.random()))
    t_store, m_store = MemoryStore(), MemoryStore()
    now = 0.0
    terminal, master = Terminal(t_store, limits, now), Master(m_store, limits, now)
    accepted: dict[bytes, int] = {}
    ids_used: list[int] = []
    for kind in rng.choices(KINDS, weights, k=length):
        now += 5.0
        if kind == "accept" and terminal.sender.can_queue():
            payload = rng.randbytes(rng.randrange(1, 700))
            seq = terminal.sender.next_seq
            terminal.accept(payload, rng.choice((Priority.ALARM, Priority.ROUTINE)), now)
            accepted[payload] = seq
            ids_used.append(seq)
        elif kind == "open":
            now = opening(terminal, master, rng.randrange(20, 600), now, up, down)
        elif kind == "reboot-terminal":
            terminal = Terminal(t_store, limits, now)
        elif kind == "reboot-master":
            master = Master(m_store, limits, now)
    assert ids_used == sorted(set(ids_used)), "an id was used twice across reboots"
    fair_up, fair_down = FaultyChannel(FAIR, random.Random(1)), FaultyChannel(FAIR, random.Random(2))
    for _ in range(200):
        if not terminal.sender.pending:
            break
        now = opening(terminal, master, 600, now + 5.0, fair_up, fair_down)
    assert not terminal.sender.pending
    delivered = [d.payload for d in master.delivered()]
    assert len(delivered) == len(set(delivered)), "a message was delivered twice"
    assert sorted(delivered) == sorted(accepted), "an accepted message was lost (or one never accepted delivered)"
    assert t_store.load().keys() <= {COUNTER_KEY}, "a delivered message's record outlived it"


def test_a_routine_message_sent_in_one_opening_costs_two_writes() -> None:
    store, m_store = MemoryStore(), MemoryStore()
    terminal, master = Terminal(store, Limits(), 0.0), Master(m_store, Limits(), 0.0)
    up, down = FaultyChannel(FAIR, random.Random(1)), FaultyChannel(FAIR, random.Random(2))
    now = 0.0
    for k in range(64):
        terminal.accept(bytes([k]) * 83, Priority.ROUTINE, now)  # a demo gauge report is 40-120 bytes
        now = opening(terminal, master, 300, now + 900.0, up, down)
    counters = terminal.outbox.counters
    assert counters.accepted == counters.finished == 64
    assert store.writes == 2 * 64, store.writes  # accepted; finished
    assert counters.counter_writes == 64 // ID_RESERVATION  # the counter rides in 1 of 16 acceptance commits
    assert len(master.delivered()) == 64


def test_partly_acknowledged_ranges_survive_and_are_not_sent_again() -> None:
    store, m_store = MemoryStore(), MemoryStore()
    terminal, master = Terminal(store, Limits(), 0.0), Master(m_store, Limits(), 0.0)
    up, down = FaultyChannel(FAIR, random.Random(1)), FaultyChannel(FAIR, random.Random(2))
    payload = bytes(range(256)) * 4  # 1028 bytes sealed: several openings
    terminal.accept(payload, Priority.ROUTINE, 0.0)
    now = opening(terminal, master, 300, 1.0, up, down)
    stored = records.MESSAGE.parse(store.load()[message_key(0)])
    assert [(r.start, r.end) for r in stored.acked] == [(0, 280)]  # 256 + 24 bytes in 300 bytes of frames
    rebooted = Terminal(store, Limits(), now)
    assert rebooted.kept.messages == 1 and rebooted.kept.next_seq == ID_RESERVATION
    first = rebooted.sender.next_fragment(256, now)
    assert first is not None and first.offset == 280  # the confirmed 280 bytes do not go again
    # A message accepted after the reboot takes an id past the reservation, never a used one.
    assert rebooted.accept(b"after", Priority.ROUTINE, now) == ID_RESERVATION


def test_acceptance_is_refused_as_a_whole_when_the_commit_fails(tmp_path: Path) -> None:
    path = tmp_path / "outbox.db"
    store = SqliteStore(path, busy_timeout=0.0)
    terminal = Terminal(store, Limits(), 0.0)
    batch = terminal.outbox.accept(b"reading", Priority.ROUTINE, 0.0)
    other = sqlite3.connect(path, isolation_level=None)
    other.execute("BEGIN IMMEDIATE")  # another process holds the write lock: a real refusal
    with pytest.raises(StoreError, match="locked"):
        store.commit(batch)
    other.execute("ROLLBACK")
    terminal.outbox.abandon()  # what the shell does when its commit failed: the message is not accepted
    assert terminal.sender.pending == 0 and store.load() == {} and store.writes == 0
    again = terminal.outbox.accept(b"reading", Priority.ROUTINE, 0.0)
    store.commit(again)
    assert terminal.outbox.committed(again) == 0  # the refused acceptance used no id
    assert sorted(store.load()) == sorted([COUNTER_KEY, message_key(0)])
    with pytest.raises(UsageError, match="sender changed"):
        batch = terminal.outbox.accept(b"later", Priority.ROUTINE, 0.0)
        terminal.sender.queue(b"x", 0.0)  # touching the sender between a batch and its commit
        terminal.outbox.committed(batch)


def test_sqlite_store_round_trip_and_log(tmp_path: Path) -> None:
    path = tmp_path / "state.db"
    store = SqliteStore(path)
    store.commit(Batch({"a": b"1", "b": b"2"}, appends=(b"x", b"y")))
    store.commit(Batch({"a": b"3"}, frozenset({"b"}), (b"z",)))
    store.commit(Batch())  # empty: not a write
    assert store.writes == 2
    store.close()
    again = SqliteStore(path)
    assert again.load() == {"a": b"3"}
    assert again.log_after(1, 10) == [(2, b"y"), (3, b"z")]
    modes = sqlite3.connect(path).execute("PRAGMA journal_mode").fetchone()
    assert modes == ("wal",)
    # synchronous is a setting of the connection, not of the file: read it on the store's own.
    assert again._db.execute("PRAGMA synchronous").fetchone() == (2,)  # FULL (sqlite.org, "PRAGMA synchronous")


def test_a_new_store_is_its_owners_alone(tmp_path: Path) -> None:
    old = os.umask(0o022)
    try:
        path = tmp_path / "outbox.db"
        store = SqliteStore(path)
        store.commit(Batch({"auth/root": bytes(32)}))
        files = [path, Path(f"{path}-wal"), Path(f"{path}-shm")]  # the log files exist while it is open
        assert {f.name: stat.S_IMODE(f.stat().st_mode) for f in files} == {f.name: 0o600 for f in files}
        store.close()
        loose = tmp_path / "loose.db"
        SqliteStore(loose).close()
        loose.chmod(0o644)
        SqliteStore(loose).close()  # a store without keys in it may be read by others
        with pytest.raises(UsageError, match=r"others may read it \(mode 0644\); run: chmod 600 .*loose.db"):
            SqliteStore(loose, private=True)
    finally:
        os.umask(old)


def test_a_damaged_store_is_a_decode_error_naming_the_file(tmp_path: Path) -> None:
    path = tmp_path / "outbox.db"
    store = SqliteStore(path)
    for i in range(50):
        store.commit(Batch({f"message/{i}": bytes(300)}, appends=(bytes(200),)))
    store.close()  # the last connection folds the WAL into the file
    page = 4096
    pages = path.stat().st_size // page
    assert pages > 4
    for number in range(1, pages):  # every page but the header's: its b-tree page type made nonsense
        damaged = tmp_path / f"damaged-{number}.db"
        data = bytearray(path.read_bytes())
        data[number * page] = 0x77
        damaged.write_bytes(bytes(data))
        damaged.chmod(0o600)
        opened = SqliteStore(damaged)
        with pytest.raises(DecodeError, match=f"{damaged.name}: the (records|log) cannot be read"):
            opened.load()
            opened.log_after(0, 1000)
        opened.close()


def test_sqlite_store_refuses_a_file_that_is_not_one(tmp_path: Path) -> None:
    other = tmp_path / "other.db"
    sqlite3.connect(other).execute("CREATE TABLE t (x)")
    with pytest.raises(UsageError, match="not an ionotrail store"):
        SqliteStore(other)
    garbage = tmp_path / "garbage.db"
    garbage.write_bytes(b"this is not a database at all" * 100)
    with pytest.raises(UsageError, match="garbage.db: not a store"):
        SqliteStore(garbage)


@pytest.mark.parametrize(
    ("key", "value", "match"),
    [
        (COUNTER_KEY, b"\x02" + bytes(8), "record counter/message-id"),
        (message_key(3), records.MESSAGE.build({"seq": 4, "urgent": False, "created": 0.0, "acked": [], "sealed": b"abcdefgh"}), "holds message 4"),
        (message_key(40), records.MESSAGE.build({"seq": 40, "urgent": False, "created": 0.0, "acked": [], "sealed": b"abcdefgh"}), "not below the saved id ceiling"),
        (message_key(3), records.MESSAGE.build({"seq": 3, "urgent": False, "created": 0.0, "acked": [{"start": 2, "end": 99}], "sealed": b"abcdefgh"}), "acknowledged ranges"),
        (message_key(3), b"\x01\x00", "record message/3"),
        (message_key(3), records.MESSAGE.build({"seq": 3, "urgent": False, "created": 0.0, "acked": [], "sealed": b"abcdefgh"}), "CRC-32C"),
    ],
)  # fmt: skip
def test_records_that_do_not_decode_raise_the_decode_family(key: str, value: bytes, match: str) -> None:
    stored = {COUNTER_KEY: records.COUNTER.build({"ceiling": 16}), key: value}
    with pytest.raises(DecodeError, match=match):
        Outbox(Sender(TERMINAL, MASTER)).restore(stored, 0.0)


def test_the_journal_keeps_windows_and_partials_and_drops_what_expired() -> None:
    limits = Limits()
    store = MemoryStore()
    master = Master(store, limits, 0.0)
    sender = Sender(TERMINAL, MASTER)
    sender.queue(b"A" * 600, 0.0)
    sender.queue(b"B" * 20, 0.0)
    for fragment in sender.fill(2000, 0.0)[:2]:  # message 0's first 256 bytes, then its next 256
        master.receive(fragment, 1.0)
    keys = set(store.load())
    assert keys == {"partial/0/2609/7/0"}
    rebooted = Master(store, limits, 2.0)
    assert rebooted.reassembler.held((False, TERMINAL, MASTER), 0) == ((0, 512),)
    rebooted.reassembler.expire(2.0 + limits.reassembly_lifetime)
    batch = rebooted.journal.changes()
    assert batch.deletes == frozenset({"partial/0/2609/7/0"})


def test_a_reassembler_without_a_journal_remembers_no_changes() -> None:
    """Tracking what changed costs memory only while a journal clears it at each commit."""
    receiver, sender = Reassembler(), Sender(TERMINAL, MASTER)
    for k in range(30):
        sender.queue(bytes([k]) * 300, 0.0)
    for fragment in sender.fill(20_000, 0.0):
        receiver.receive(fragment, 1.0)
    assert receiver.touched is None and receiver.window_touched is None
    MasterJournal(receiver)
    assert receiver.touched == set() and receiver.window_touched == set()


class _QuietPort(Port):
    """A modem that hears nothing (the terminal only accepts messages here)."""

    def attach(self, listener: object) -> None: ...
    def send(self, frame: bytes) -> None: ...
    def start_listening(self) -> None: ...
    def stop_listening(self) -> None: ...
    def start_probing(self, frame: bytes, interval: float) -> None: ...
    def stop_probing(self) -> None: ...
    async def close(self) -> None: ...


class _FlakyStore(MemoryStore):
    """Refuses its 3rd and 4th commits, as a full disk would, then recovers."""

    def __init__(self) -> None:
        super().__init__()
        self.calls = 0

    def commit(self, batch: Batch) -> None:
        if batch:
            self.calls += 1
            if self.calls in (3, 4):
                raise StoreError("disk full")
        super().commit(batch)


class _EverySecond:
    def __init__(self) -> None:
        self.due = 1.0

    def next_due(self) -> float | None:
        return self.due if self.due <= 10.0 else None

    def take(self, now: float, room: int) -> list[tuple[bytes, Priority]]:
        self.due += 1.0
        return [(f"reading {now:.0f}".encode(), Priority.ROUTINE)]

    def command(self, opcode: int, arguments: bytes) -> tuple[ReplyStatus, bytes]:
        return ReplyStatus.UNKNOWN_OPCODE, b""


def test_a_failed_commit_abandons_that_message_and_the_service_goes_on() -> None:
    store = _FlakyStore()
    events: list[object] = []
    link = Link(Sender(TERMINAL, MASTER), Fixed(64), bit_rate=4800.0)
    service = TerminalService(link, _QuietPort(), _EverySecond(), store=store, observer=lambda _t, e: events.append(e))
    with asyncio.Runner(loop_factory=VirtualTimeLoop) as runner:
        runner.run(service.run(until=20.0))
    queued = [e for e in events if isinstance(e, MessageQueued)]
    abandoned = [e for e in events if isinstance(e, MessageAbandoned)]
    assert len(queued) == 8 and [a.reason for a in abandoned] == ["store_failed", "store_failed"]
    assert service.store_failures == 2 and not service.outbox._pending
    assert len([k for k in store.load() if k.startswith("message/")]) == 8  # exactly the accepted ones


def test_stored_values_past_any_real_use_are_refused_at_boot(tmp_path: Path) -> None:
    from ionotrail.terminal.link.commands import RECORD_KEY, CommandMemory
    from ionotrail.terminal.outbox.journal import window_key

    with pytest.raises(DecodeError, match="id ceiling"):
        Outbox(Sender(TERMINAL, MASTER)).restore({COUNTER_KEY: records.COUNTER.build({"ceiling": 1 << 63})}, 0.0)
    source = (False, TERMINAL, MASTER)
    window = records.WINDOW.build({"downlink": False, "terminal": TERMINAL, "master": MASTER, "top": 1 << 63, "bitmap": bytes(8)})
    with pytest.raises(DecodeError, match="window edge"):
        MasterJournal(Reassembler()).restore({window_key(source): window}, 0.0)
    memory = records.COMMANDS.build(
        {"has_top": True, "top": 1, "seen": b"\x00" * 7 + b"\x01", "replies": [{"command_id": 1, "answered": True, "frame": b"not a frame"}]}
    )
    with pytest.raises(DecodeError):
        CommandMemory(Limits()).restore({RECORD_KEY: memory})
    path = tmp_path / "typed.db"
    SqliteStore(path).close()
    db = sqlite3.connect(path)
    db.execute("INSERT INTO records (key, value) VALUES ('message/1', 'text, not a blob')")
    db.commit()
    db.close()
    with pytest.raises(DecodeError, match="not text and blob"):
        SqliteStore(path).load()
