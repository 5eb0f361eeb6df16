"""A store in an SQLite file: what a terminal or master on a real port keeps across power cuts.

WAL journal with ``synchronous=FULL``: every commit syncs the WAL, so a
commit that has returned survives a power cut (with ``NORMAL`` the last
commits may roll back; sqlite.org, "PRAGMA synchronous" and "Write-Ahead
Logging").  Each :class:`~ionotrail.terminal.outbox.store.Batch` is one
transaction (``BEGIN IMMEDIATE`` ... ``COMMIT``): its records are all there
after a crash or none is.  Records live in ``records(key, value)``, the log
in ``log(position, entry)``; the file carries ``user_version`` 1 and an
``application_id`` so that a file of anything else is refused.

A new file is created readable and writable by its owner only (SQLite gives
its ``-wal`` and ``-shm`` files the database file's permissions): a terminal's
store holds its keys (docs/keys.md).  ``private=True`` (a station given keys)
refuses a file that others may read, as a key file is refused.  A damaged file
(a page that does not parse) is a decode error naming the file, raised when it
is read, never a traceback.
"""

from __future__ import annotations

import os
import sqlite3
import stat

from ionotrail.terminal.errors import BadField, UsageError
from ionotrail.terminal.limits import STORE_BUSY_TIMEOUT_S
from ionotrail.terminal.outbox.store import Batch, StoreError

APPLICATION_ID = 0x696F6E74  # "iont"
SCHEMA_VERSION = 1


class SqliteStore:
    """Records and log in one SQLite file, opened (and created if absent) at ``path``.

    ``busy_timeout`` is how long a commit waits for a lock another process holds."""

    def __init__(
        self, path: str | os.PathLike[str], *, private: bool = False, busy_timeout: float = STORE_BUSY_TIMEOUT_S
    ) -> None:
        self.path = os.fspath(path)
        self._writes = 0
        try:
            # An empty file, which SQLite takes for a new database: the mode is set here.
            fd = os.open(self.path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        except FileExistsError:
            pass
        except OSError as exc:
            raise UsageError(f"{self.path}: cannot create the store ({exc.strerror})") from None
        else:
            os.close(fd)
        if private:
            mode = os.stat(self.path).st_mode
            if mode & (stat.S_IRWXG | stat.S_IRWXO):
                raise UsageError(
                    f"{self.path}: the store holds key material and others may read it (mode {stat.S_IMODE(mode):04o}); "
                    f"run: chmod 600 {self.path}"
                )
        try:
            # isolation_level=None: the transactions are explicit.
            self._db = sqlite3.connect(self.path, isolation_level=None, timeout=busy_timeout)
            self._prepare()
        except sqlite3.DatabaseError as exc:
            raise UsageError(f"{self.path}: not a store this program can use ({exc})") from None

    def _prepare(self) -> None:
        db = self._db
        application_id = db.execute("PRAGMA application_id").fetchone()[0]
        version = db.execute("PRAGMA user_version").fetchone()[0]
        tables = {row[0] for row in db.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
        if application_id == 0 and version == 0 and not tables:  # a new file
            db.execute("PRAGMA journal_mode = WAL")
            db.execute("BEGIN IMMEDIATE")
            db.execute("CREATE TABLE records (key TEXT PRIMARY KEY, value BLOB NOT NULL) WITHOUT ROWID")
            db.execute("CREATE TABLE log (position INTEGER PRIMARY KEY, entry BLOB NOT NULL)")
            db.execute(f"PRAGMA application_id = {APPLICATION_ID}")
            db.execute(f"PRAGMA user_version = {SCHEMA_VERSION}")
            db.execute("COMMIT")
        elif application_id != APPLICATION_ID:
            raise UsageError(f"{self.path}: an SQLite file, but not an ionotrail store (application_id {application_id:#x})")
        elif version != SCHEMA_VERSION:
            raise UsageError(f"{self.path}: store version {version}; this program reads version {SCHEMA_VERSION}")
        mode = db.execute("PRAGMA journal_mode = WAL").fetchone()[0]
        if mode != "wal":
            raise UsageError(f"{self.path}: the store needs write-ahead logging, and SQLite gave journal mode {mode!r}")
        db.execute("PRAGMA synchronous = FULL")

    @property
    def writes(self) -> int:
        return self._writes

    def load(self) -> dict[str, bytes]:
        """Every record; a row that is not a text key with a blob value (the file
        was written by something else) is a :class:`~ionotrail.terminal.errors.BadField`."""
        out: dict[str, bytes] = {}
        try:
            rows = self._db.execute("SELECT key, value FROM records").fetchall()
        except sqlite3.DatabaseError as exc:
            raise BadField(f"{self.path}: the records cannot be read ({exc})") from None
        for key, value in rows:
            if not isinstance(key, str) or not isinstance(value, bytes):
                raise BadField(f"{self.path}: a record row of types {type(key).__name__} and {type(value).__name__}, not text and blob")
            out[key] = value
        return out

    def commit(self, batch: Batch) -> None:
        if not batch:
            return
        db = self._db
        try:
            db.execute("BEGIN IMMEDIATE")
            try:
                db.executemany("DELETE FROM records WHERE key = ?", [(key,) for key in sorted(batch.deletes)])
                db.executemany("INSERT OR REPLACE INTO records (key, value) VALUES (?, ?)", sorted(batch.puts.items()))
                db.executemany("INSERT INTO log (entry) VALUES (?)", [(entry,) for entry in batch.appends])
                db.execute("COMMIT")
            except BaseException:
                if db.in_transaction:
                    db.execute("ROLLBACK")
                raise
        except (sqlite3.Error, OSError) as exc:
            raise StoreError(f"{self.path}: the commit failed: {exc}") from exc
        self._writes += 1

    def log_after(self, position: int, limit: int) -> list[tuple[int, bytes]]:
        try:
            rows = self._db.execute(
                "SELECT position, entry FROM log WHERE position > ? ORDER BY position LIMIT ?", (position, limit)
            ).fetchall()
        except sqlite3.DatabaseError as exc:
            raise BadField(f"{self.path}: the log cannot be read ({exc})") from None
        out: list[tuple[int, bytes]] = []
        for p, e in rows:
            if not isinstance(p, int) or not isinstance(e, bytes):
                raise BadField(f"{self.path}: a log row of types {type(p).__name__} and {type(e).__name__}, not integer and blob")
            out.append((p, e))
        return out

    def close(self) -> None:
        self._db.close()
