"""The spill store: encoded models of idle services, on disk, keyed by service.

When more models are live than ``limits.max_live_models`` allows, the registry encodes the
least recently scored ones with :func:`models.encode_state` (signed with the state key when one
is set) and moves them here; a spilled service's model is read back and verified with
:func:`models.decode_state` when its next window closes.

The store is a *cache*, not the record of learned state: the checkpoint (embedded) or the
changelog (Kafka) stays the record, and both include spilled models. So the file is created
empty when a process opens it (a file left by an earlier process is removed first) and needs no
durability: a crash loses nothing the record does not hold.

Why SQLite (the standard library's ``sqlite3``): one file, keyed point reads and writes that stay
fast at hundreds of thousands of rows (a B-tree on the key, no in-memory index to hold), values
of tens of kilobytes in place, and space reused after deletes, with no extra package. Journaling
and syncing are off because the file is a throw-away cache (see above).

Single-threaded: only the scoring thread calls it (the metrics scrape reads the counters the
registry keeps, never the file).
"""

from __future__ import annotations

import os
import shutil
import sqlite3
import tempfile
import weakref
from collections.abc import Iterator
from pathlib import Path

from service.errors import StateStoreError

__all__ = ["SpillStore", "SPILL_FILE"]

SPILL_FILE = "spill.sqlite3"


class SpillStore:
    """Encoded model records by service, in one SQLite file.

    Parameters
    ----------
    directory
        Where the file goes (created if missing); None makes a private temporary directory that is
        removed when the store is closed or the process exits.
    key
        The HMAC key the records are signed with (None: unsigned); readers verify with it.
    """

    def __init__(self, directory: str | os.PathLike[str] | None = None, *, key: bytes | None = None) -> None:
        self.key = key
        self._tmp: str | None = None
        try:
            if directory is None:
                self._tmp = tempfile.mkdtemp(prefix="tidewatch-spill-")  # mode 0700: private to this user
                directory = self._tmp
            self.dir = Path(directory)
            self.dir.mkdir(parents=True, exist_ok=True)
            self.path = self.dir / SPILL_FILE
            # A file left by an earlier process is stale: the checkpoint or changelog is the record.
            for suffix in ("", "-journal", "-wal", "-shm"):
                Path(str(self.path) + suffix).unlink(missing_ok=True)
            self._db = sqlite3.connect(self.path, isolation_level=None, check_same_thread=False)
            self._db.execute("PRAGMA journal_mode=OFF")  # a cache: no crash recovery needed (module docstring)
            self._db.execute("PRAGMA synchronous=OFF")
            self._db.execute("CREATE TABLE models (service TEXT PRIMARY KEY, record BLOB NOT NULL) WITHOUT ROWID")
        except (OSError, sqlite3.Error) as exc:
            if self._tmp is not None:
                shutil.rmtree(self._tmp, ignore_errors=True)
            raise StateStoreError(f"cannot open the model spill store in {directory}: {exc}") from exc
        self._finalizer = weakref.finalize(self, _cleanup, self._db, self._tmp)
        self.count = 0  # rows, kept here so nothing has to ask the file
        self.bytes = 0  # record bytes held (rows' payload, not the file's size)
        self._sizes: dict[str, int] = {}

    def __contains__(self, service: object) -> bool:
        return service in self._sizes

    def __len__(self) -> int:
        return self.count

    def put(self, service: str, record: bytes) -> None:
        """Store (or replace) the record of ``service``; raises :class:`StateStoreError` when the disk refuses."""
        try:
            self._db.execute("INSERT OR REPLACE INTO models (service, record) VALUES (?, ?)", (service, record))
        except sqlite3.Error as exc:
            raise StateStoreError(f"the model spill store refused a write: {exc}") from exc
        old = self._sizes.get(service)
        if old is None:
            self.count += 1
        else:
            self.bytes -= old
        self._sizes[service] = len(record)
        self.bytes += len(record)

    def get(self, service: str) -> bytes | None:
        """The stored record of ``service``, or None (absent, or the file cannot be read)."""
        if service not in self._sizes:
            return None
        try:
            row = self._db.execute("SELECT record FROM models WHERE service = ?", (service,)).fetchone()
        except sqlite3.Error:
            return None
        return None if row is None else bytes(row[0])

    def take(self, service: str) -> bytes | None:
        """Remove and return the record of ``service`` (None when absent or unreadable; it is removed either way)."""
        record = self.get(service)
        self.delete(service)
        return record

    def delete(self, service: str) -> None:
        size = self._sizes.pop(service, None)
        if size is None:
            return
        self.count -= 1
        self.bytes -= size
        try:
            self._db.execute("DELETE FROM models WHERE service = ?", (service,))
        except sqlite3.Error:
            pass  # an unreadable row is as good as gone: it is no longer listed

    def services(self) -> list[str]:
        return list(self._sizes)

    def records(self) -> Iterator[tuple[str, bytes]]:
        """Every (service, record), in key order; rows the file cannot give back are skipped."""
        try:
            cursor = self._db.execute("SELECT service, record FROM models ORDER BY service")
            for service, record in cursor:
                if service in self._sizes:
                    yield service, bytes(record)
        except sqlite3.Error:
            return

    def close(self) -> None:
        self._finalizer()


def _cleanup(db: sqlite3.Connection, tmp: str | None) -> None:
    try:
        db.close()
    except sqlite3.Error:
        pass
    if tmp is not None:
        shutil.rmtree(tmp, ignore_errors=True)
