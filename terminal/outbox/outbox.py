"""The terminal's durable outbox: the sender's queue as records that survive a power cut.

A message is *accepted* only once it is durable.  :meth:`Outbox.accept`
turns a payload into a :class:`~ionotrail.terminal.outbox.store.Batch` (its
record, and when its id reaches the reserved ceiling a new ceiling); the
shell commits it and calls :meth:`Outbox.committed`, and only then does the
message enter the :class:`~ionotrail.terminal.delivery.sender.Sender`.

Message ids never repeat across reboots.  The counter is saved RFC 4303 s5
style: before the outbox uses an id at or above the saved ceiling R it saves
R + :data:`~ionotrail.terminal.limits.ID_RESERVATION`, in the same commit as
the message that needs it; after a reboot it goes on from the saved ceiling.
Every id sent after a reboot is larger than every id sent before it, and a
reboot skips at most ``ID_RESERVATION`` ids.  (Reused, an id would meet the
master's completed-id window and the message would be taken for a repeat.)

What the master acknowledged survives too.  After the link has applied an
acknowledgement, :meth:`Outbox.changes` gives the batch that brings the
records up to date: a finished or dropped message's record deleted, a partly
acknowledged message's ranges rewritten.  A reboot therefore never resends a
byte the master confirmed, except for a confirmation that arrived in the
instant between the link applying it and the commit returning; resent then,
the master's completed-id window answers "complete" again and delivers
nothing twice.

Writes are the flash's wear.  A routine message sent in one opening costs
two synchronous writes (accepted; finished); each acknowledgement that
changes a partly sent message's ranges costs one more.  :class:`OutboxCounters`
counts them.
"""

from __future__ import annotations

import dataclasses
import itertools
from collections.abc import Mapping

from ionotrail.terminal.delivery.sender import Priority, Sender
from ionotrail.terminal.errors import BadField, UsageError
from ionotrail.terminal.limits import ID_RESERVATION
from ionotrail.terminal.outbox import records
from ionotrail.terminal.outbox.store import Batch
from ionotrail.terminal.wire.codec import seal_message, unseal_message

COUNTER_KEY = "counter/message-id"
MAX_STORED_ID = 1 << 62
"""No terminal reaches this many messages (a thousand a second for a hundred
million years); a stored id or ceiling past it is damage, refused at boot."""
MESSAGE_PREFIX = "message/"


def message_key(seq: int) -> str:
    return f"{MESSAGE_PREFIX}{seq}"


@dataclasses.dataclass(slots=True)
class OutboxCounters:
    accepted: int = 0
    restored: int = 0
    commits: int = 0
    """Batches this outbox asked to be made durable (each one synchronous write)."""
    counter_writes: int = 0
    """Of those, commits that also saved a new id ceiling."""
    finished: int = 0
    """Records deleted: messages acknowledged, refused or dropped."""
    range_updates: int = 0
    """Records rewritten with new acknowledged ranges."""


@dataclasses.dataclass(frozen=True, slots=True)
class OutboxBatch(Batch):
    """A batch the outbox made, with what it needs to know once it is durable."""

    version: int = 0
    """The sender's durable version it was made from."""
    ranges: Mapping[int, tuple[tuple[int, int], ...]] = dataclasses.field(default_factory=dict)
    """Acknowledged ranges it rewrites, by message."""


@dataclasses.dataclass(frozen=True, slots=True)
class Kept:
    """What the outbox restored at boot."""

    messages: int
    next_seq: int


class Outbox:
    """Keeps ``sender``'s queue durable through the shell's store."""

    def __init__(self, sender: Sender, *, reservation: int = ID_RESERVATION) -> None:
        if not 1 <= reservation <= sender.limits.duplicate_window // 2:
            raise UsageError(
                f"an id reservation of {reservation} must be 1 to half the duplicate window ({sender.limits.duplicate_window // 2})"
            )
        self.sender = sender
        self.reservation = reservation
        self.counters = OutboxCounters()
        self._ceiling = 0  # ids below it may have been used
        self._stored: dict[int, tuple[tuple[int, int], ...]] = {}  # seq -> acknowledged ranges as stored
        self._seen_version = sender.durable_version
        self._pending: tuple[OutboxBatch, bytes, Priority, float, int] | None = None  # accepted, not yet committed
        self._restored = False

    # --- boot -----------------------------------------------------------------------

    def restore(self, stored: Mapping[str, bytes], now: float) -> Kept:
        """Take up what a store kept (its :meth:`~ionotrail.terminal.outbox.store.Store.load`).
        Kept messages are queued again with creation time ``now`` (the clock of the
        last boot is gone), in id order.  Records that do not decode raise
        :class:`~ionotrail.terminal.errors.DecodeError`."""
        if self._restored or self.counters.accepted:
            raise UsageError("an outbox restores once, before it accepts anything")
        ceiling = 0
        if COUNTER_KEY in stored:
            ceiling = records.parse(records.COUNTER, COUNTER_KEY, stored[COUNTER_KEY]).ceiling
            if ceiling > MAX_STORED_ID:
                raise BadField(f"record {COUNTER_KEY}: an id ceiling of {ceiling}, past any this terminal could have used")
        kept: list[tuple[int, bytes, Priority, float, tuple[tuple[int, int], ...]]] = []
        for key, value in stored.items():
            if not key.startswith(MESSAGE_PREFIX):
                continue
            record = records.parse(records.MESSAGE, key, value)
            if key != message_key(record.seq):
                raise BadField(f"record {key}: holds message {record.seq}")
            if record.seq >= ceiling:
                raise BadField(f"record {key}: message {record.seq} is not below the saved id ceiling {ceiling}")
            acked = tuple((r.start, r.end) for r in record.acked)
            if not 0 < len(record.sealed) <= self.sender.limits.max_sealed_message:
                raise BadField(f"record {key}: a sealed message of {len(record.sealed)} bytes")
            if any(not 0 <= s < e <= len(record.sealed) for s, e in acked) or any(
                a[1] >= b[0] for a, b in itertools.pairwise(acked)
            ):
                raise BadField(
                    f"record {key}: acknowledged ranges {list(acked)} are not ascending, disjoint ranges inside the message"
                )
            unseal_message(bytes(record.sealed))  # a record the medium corrupted is refused, not sent
            priority = Priority.ALARM if record.urgent else Priority.ROUTINE
            kept.append((record.seq, bytes(record.sealed), priority, now, acked))
        if len(kept) > self.sender.limits.max_queued_messages:
            raise BadField(
                f"the store keeps {len(kept)} messages; this terminal's queue holds {self.sender.limits.max_queued_messages}"
            )
        self.sender.resume(ceiling, kept)
        self._ceiling = ceiling
        self._stored = {seq: acked for seq, _, _, _, acked in kept}
        self._seen_version = self.sender.durable_version
        self._restored = True
        self.counters.restored += len(kept)
        return Kept(len(kept), ceiling)

    # --- accepting ------------------------------------------------------------------

    def accept(self, payload: bytes, priority: Priority, now: float) -> OutboxBatch:
        """The batch that makes ``payload`` durable; commit it, then call
        :meth:`committed`.  One acceptance at a time."""
        if self._pending is not None:
            raise UsageError("the last accepted message is not committed yet")
        sender = self.sender
        if len(payload) > sender.limits.max_message_payload or not payload:
            raise UsageError(
                f"a message of {len(payload)} bytes: this link carries 1 to {sender.limits.max_message_payload}"
            )
        if not sender.can_queue():
            raise UsageError(
                f"the outbox already holds {sender.limits.max_queued_messages} messages; check can_queue() first"
            )
        seq = sender.next_seq
        puts = {
            message_key(seq): records.MESSAGE.build(
                {
                    "seq": seq,
                    "urgent": priority is Priority.ALARM,
                    "created": now,
                    "acked": [],
                    "sealed": seal_message(payload),
                }
            )
        }
        ceiling = self._ceiling
        if seq >= ceiling:
            ceiling = seq + self.reservation
            puts[COUNTER_KEY] = records.COUNTER.build({"ceiling": ceiling})
        before = self.changes()  # what acknowledgements changed rides along
        batch = OutboxBatch({**before.puts, **puts}, before.deletes, version=before.version, ranges=before.ranges)
        self._pending = (batch, payload, Priority(priority), now, ceiling)
        return batch

    def committed(self, batch: OutboxBatch) -> int:
        """``batch`` is durable: a batch from :meth:`accept` queues its message in
        the sender (returns its 16-bit id); one from :meth:`changes` returns -1.
        Commit a batch before anything else touches the sender: the outbox checks."""
        if batch.version != self.sender.durable_version:
            raise UsageError(
                "the sender changed between a batch and its commit; commit each batch as soon as it is made"
            )
        self.counters.commits += 1
        for key in batch.deletes:
            if key.startswith(MESSAGE_PREFIX):
                del self._stored[int(key[len(MESSAGE_PREFIX) :])]
                self.counters.finished += 1
        for seq, ranges in batch.ranges.items():
            self._stored[seq] = ranges
            self.counters.range_updates += 1
        message_id = -1
        if self._pending is not None and self._pending[0] is batch:
            _, payload, priority, now, ceiling = self._pending
            self._pending = None
            if ceiling != self._ceiling:
                self.counters.counter_writes += 1
            self._ceiling = ceiling
            seq = self.sender.next_seq
            message_id = self.sender.queue(payload, now, priority)
            self._stored[seq] = ()
            self.counters.accepted += 1
        self._seen_version = self.sender.durable_version
        return message_id

    def abandon(self) -> None:
        """The shell could not make the accepted message durable: it is not accepted."""
        self._pending = None

    # --- keeping up with the sender -------------------------------------------------

    def changes(self) -> OutboxBatch:
        """What the records lack since the last commit: records of messages the
        sender no longer holds deleted, changed acknowledged ranges rewritten.
        Empty (and cheap) when nothing changed."""
        sender = self.sender
        version = sender.durable_version
        if version == self._seen_version:
            return OutboxBatch(version=version)
        kept = sender.kept()
        deletes = frozenset(message_key(seq) for seq in self._stored if seq not in kept)
        puts: dict[str, bytes] = {}
        ranges: dict[int, tuple[tuple[int, int], ...]] = {}
        for seq, (priority, created, acked) in kept.items():
            if seq in self._stored and self._stored[seq] != acked:
                ranges[seq] = acked
                puts[message_key(seq)] = records.MESSAGE.build(
                    {
                        "seq": seq,
                        "urgent": priority is Priority.ALARM,
                        "created": created,
                        "acked": [{"start": s, "end": e} for s, e in acked],
                        "sealed": sender.sealed(seq),
                    }
                )
        return OutboxBatch(puts, deletes, version=version, ranges=ranges)


__all__ = ["COUNTER_KEY", "Kept", "Outbox", "OutboxBatch", "OutboxCounters", "message_key"]
