"""What the core asks of durable storage, and nothing more.

The protocol core never touches a disk.  When something must survive a power
cut (a message accepted, a message delivered, a counter reserved, a key
rotated), the core hands its shell a :class:`Batch`: records to put, keys to
delete, entries to append to a log.  The shell gives it to a :class:`Store`,
whose :meth:`Store.commit` returns only once the whole batch is durable, and
then tells the core (``committed``).  A batch is applied wholly or not at
all; nothing that depends on it (an acknowledgement, a reply, a message
entering the send queue) happens before the core is told.

Two stores implement the interface: in memory (:mod:`ionotrail.terminal.stores.memory`,
for simulation) and SQLite (:mod:`ionotrail.terminal.stores.sqlite`, WAL,
``synchronous=FULL``, for a station on a real port).  Both count their
synchronous writes, the figure that wears out a terminal's flash.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from typing import Protocol

from ionotrail.terminal.errors import UsageError

MAX_KEY_CHARS = 64
"""Record keys are short ASCII names (``message/12``, ``counter/message-id``)."""


@dataclasses.dataclass(frozen=True, slots=True, repr=False)
class Batch:
    """One atomic change to a store.  Its repr names keys and sizes, never
    values: a terminal's key state travels in batches (docs/keys.md)."""

    puts: Mapping[str, bytes] = dataclasses.field(default_factory=dict)
    """Records to create or replace, by key."""
    deletes: frozenset[str] = frozenset()
    """Keys to remove (absent keys are no error)."""
    appends: tuple[bytes, ...] = ()
    """Entries for the store's append-only log, in order (the master's deliveries)."""

    def __post_init__(self) -> None:
        for key in (*self.puts, *self.deletes):
            if not (isinstance(key, str) and 0 < len(key) <= MAX_KEY_CHARS and key.isascii() and key.isprintable()):
                raise UsageError(f"record key {key!r} must be 1 to {MAX_KEY_CHARS} printable ASCII characters")
        if set(self.puts) & self.deletes:
            raise UsageError(f"a batch both puts and deletes {sorted(set(self.puts) & self.deletes)}")
        for value in (*self.puts.values(), *self.appends):
            if not isinstance(value, bytes):
                raise UsageError(f"records are bytes, not {type(value).__name__}")

    def __bool__(self) -> bool:
        return bool(self.puts or self.deletes or self.appends)

    def __repr__(self) -> str:
        puts = ", ".join(f"{key}: {len(value)} bytes" for key, value in sorted(self.puts.items()))
        return f"Batch(puts={{{puts}}}, deletes={sorted(self.deletes)}, appends={len(self.appends)} entries)"

    def merged(self, later: Batch) -> Batch:
        """This batch followed by ``later``, as one."""
        puts = {k: v for k, v in self.puts.items() if k not in later.deletes} | dict(later.puts)
        deletes = (self.deletes - set(later.puts)) | later.deletes
        return Batch(puts, frozenset(deletes), self.appends + later.appends)


class StoreError(Exception):
    """The store could not make a batch durable (a full disk, a locked or damaged
    file).  Nothing of the batch was applied; the core's state is as before it."""


class Store(Protocol):
    """Durable records (a key-value map) and an append-only log."""

    @property
    def writes(self) -> int:
        """Synchronous writes (commits that reached the medium) so far."""

    def load(self) -> dict[str, bytes]:
        """Every record, as the last completed commit left them."""

    def commit(self, batch: Batch) -> None:
        """Apply ``batch`` atomically; return only when it is durable.  Raises
        :class:`StoreError` when it cannot (and then applies none of it)."""

    def log_after(self, position: int, limit: int) -> list[tuple[int, bytes]]:
        """Up to ``limit`` log entries numbered after ``position`` (entries are numbered from 1), oldest first."""
