"""A store in memory, for simulation: the same interface and counts as on disk."""

from __future__ import annotations

from ionotrail.terminal.outbox.store import Batch


class MemoryStore:
    """Records in a dict, the log in a list; every non-empty commit counts as one write."""

    def __init__(self) -> None:
        self.records: dict[str, bytes] = {}
        self.entries: list[bytes] = []
        self._writes = 0

    @property
    def writes(self) -> int:
        return self._writes

    def load(self) -> dict[str, bytes]:
        return dict(self.records)

    def commit(self, batch: Batch) -> None:
        if not batch:
            return
        for key in batch.deletes:
            self.records.pop(key, None)
        self.records.update(batch.puts)
        self.entries.extend(batch.appends)
        self._writes += 1

    def log_after(self, position: int, limit: int) -> list[tuple[int, bytes]]:
        start = max(0, position)
        return [(start + 1 + k, entry) for k, entry in enumerate(self.entries[start : start + limit])]
