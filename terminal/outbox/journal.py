"""The master's durable state: completed-id windows, partial messages and deliveries, together.

A master that restarts must neither deliver a message twice nor forget one
it acknowledged.  Both follow from one rule: a delivery, and the completed-id
window that will recognise every later copy of it, are made durable in *one*
commit, before the acknowledgement that tells the terminal "complete" goes on
the air.  The deliveries are the store's log: the sink is fed from the log
after the commit, so a crash between the two loses nothing (the shell catches
the sink up from the log at its next start).

Partial messages are kept too, so that a restart does not ask for bytes the
master already acknowledged.  :meth:`MasterJournal.changes` rewrites only
what the reassembler touched since the last commit.  The reassembly lifetime
of a kept partial message starts again at the restart.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Hashable, Mapping, Sequence
from typing import cast

from ionotrail.terminal.delivery.reassembly import Delivery, Reassembler, Source
from ionotrail.terminal.errors import BadField, UsageError
from ionotrail.terminal.outbox import records
from ionotrail.terminal.outbox.outbox import MAX_STORED_ID
from ionotrail.terminal.outbox.store import Batch

WINDOW_PREFIX = "window/"
PARTIAL_PREFIX = "partial/"


def window_key(source: Source) -> str:
    downlink, terminal, master = source
    return f"{WINDOW_PREFIX}{int(downlink)}/{terminal}/{master}"


def partial_key(source: Source, message_id: int) -> str:
    downlink, terminal, master = source
    return f"{PARTIAL_PREFIX}{int(downlink)}/{terminal}/{master}/{message_id}"


def delivery_entry(delivery: Delivery) -> bytes:
    return bytes(
        records.DELIVERY.build(
            {
                "terminal": delivery.terminal,
                "message_id": delivery.message_id,
                "urgent": delivery.urgent,
                "completed": delivery.completed,
                "payload": delivery.payload,
            }
        )
    )


def parse_delivery(position: int, entry: bytes) -> Delivery:
    """A delivery read back from the log (raises only DecodeError)."""
    record = records.parse(records.DELIVERY, f"log entry {position}", entry)
    return Delivery(
        False,
        record.terminal,
        0,
        record.message_id,
        bytes(record.payload),
        record.urgent,
        record.completed,
        record.completed,
    )


@dataclasses.dataclass(slots=True)
class JournalCounters:
    commits: int = 0
    deliveries: int = 0
    window_writes: int = 0
    partial_writes: int = 0
    partial_deletes: int = 0


class MasterJournal:
    """Turns what the master's reassembler changed into batches for its store."""

    def __init__(self, reassembler: Reassembler) -> None:
        self.reassembler = reassembler
        reassembler.track_changes()
        self.counters = JournalCounters()
        self._windows: set[Source] = set()  # sources with a stored window
        self._partials: set[tuple[Source, int]] = set()  # partial messages with a stored record
        self._evicted = reassembler.completed.evicted

    def restore(self, stored: Mapping[str, bytes], now: float) -> tuple[int, int]:
        """Take up what the store kept; returns (windows, partial messages) restored.
        Raises :class:`~ionotrail.terminal.errors.DecodeError` for records that do not decode."""
        r = self.reassembler
        if r.partial_count or len(r.completed):
            raise UsageError("a journal restores into a fresh reassembler only")
        windows: list[tuple[Hashable, int, int]] = []
        partials = []
        for key, value in sorted(stored.items()):
            if key.startswith(WINDOW_PREFIX):
                w = records.parse(records.WINDOW, key, value)
                source: Source = (w.downlink, w.terminal, w.master)
                if key != window_key(source):
                    raise BadField(f"record {key}: holds the window of {source}")
                if w.top > MAX_STORED_ID:
                    raise BadField(f"record {key}: a window edge of {w.top}, past any id a terminal could have used")
                windows.append((source, w.top, int.from_bytes(w.bitmap, "big")))
            elif key.startswith(PARTIAL_PREFIX):
                p = records.parse(records.PARTIAL, key, value)
                source = (p.downlink, p.terminal, p.master)
                if key != partial_key(source, p.message_id):
                    raise BadField(f"record {key}: holds message {p.message_id} of {source}")
                partials.append(
                    (
                        source,
                        p.message_id,
                        p.urgent,
                        p.end if p.has_end else None,
                        tuple((c.start, bytes(c.data)) for c in p.chunks),
                    )
                )
        if len(windows) > r.completed.max_sources:
            raise BadField(
                f"the store keeps {len(windows)} completed-id windows; this master keeps {r.completed.max_sources}"
            )
        r.completed.restore(windows)
        for source, message_id, urgent, end, chunks in partials:
            try:
                r.restore_partial(source, message_id, now, urgent, end, chunks)
            except UsageError as exc:
                raise BadField(f"record {partial_key(source, message_id)}: {exc}") from None
        self._clear_tracks()
        self._windows = {cast(Source, source) for source, _, _ in windows}
        self._partials = set(r.partials())
        self._evicted = r.completed.evicted
        return len(windows), len(self._partials)

    def changes(self, deliveries: Sequence[Delivery] = ()) -> Batch:
        """The batch that makes the reassembler's changes and ``deliveries`` durable together."""
        r = self.reassembler
        touched, window_touched = r.touched or set(), r.window_touched or set()
        if not (touched or window_touched or deliveries or r.completed.evicted != self._evicted):
            return Batch()
        puts: dict[str, bytes] = {}
        deletes: set[str] = set()
        for source, message_id in touched:
            state = r.partial_state(source, message_id)
            key = partial_key(source, message_id)
            if state is None:
                if (source, message_id) in self._partials:
                    deletes.add(key)
                continue
            urgent, end, chunks = state
            puts[key] = records.PARTIAL.build(
                {
                    "downlink": source[0],
                    "terminal": source[1],
                    "master": source[2],
                    "message_id": message_id,
                    "urgent": urgent,
                    "has_end": end is not None,
                    "end": end or 0,
                    "chunks": [{"start": start, "data": data} for start, data in chunks],
                }
            )
        windows = {source: (top, bitmap) for source, top, bitmap in r.completed.snapshot()}
        for source in window_touched:
            if source in windows:
                top, bitmap = windows[source]
                puts[window_key(source)] = records.WINDOW.build(
                    {
                        "downlink": source[0],
                        "terminal": source[1],
                        "master": source[2],
                        "top": top,
                        "bitmap": bitmap.to_bytes((r.completed.window + 7) // 8, "big"),
                    }
                )
        deletes |= {window_key(source) for source in self._windows if source not in windows}
        return Batch(puts, frozenset(deletes), tuple(delivery_entry(d) for d in deliveries))

    def committed(self, batch: Batch) -> None:
        """``batch`` (the last from :meth:`changes`) is durable."""
        r = self.reassembler
        self.counters.commits += 1
        self.counters.deliveries += len(batch.appends)
        for key in batch.puts:
            if key.startswith(WINDOW_PREFIX):
                self.counters.window_writes += 1
            elif key.startswith(PARTIAL_PREFIX):
                self.counters.partial_writes += 1
        self.counters.partial_deletes += sum(1 for key in batch.deletes if key.startswith(PARTIAL_PREFIX))
        self._partials = set(r.partials())
        self._windows = {cast(Source, source) for source, _, _ in r.completed.snapshot()}
        self._clear_tracks()
        self._evicted = r.completed.evicted

    def _clear_tracks(self) -> None:
        r = self.reassembler
        if r.touched is not None and r.window_touched is not None:
            r.touched.clear()
            r.window_touched.clear()
