"""A temporary on-disk table that puts a large input in time order with bounded memory: the
readings of a replayed file or an imported export are written here first (all of them checked
before any reaches the record), then read back in time order, a batch at a time.

It lives in its own SQLite file in a temporary folder beside the database (on the same disk,
never a RAM-backed /tmp), without journal or fsync: it is scratch, deleted when closed.
SQLite sorts it with its external merge sort, so memory stays flat for any input size.
"""

from __future__ import annotations

import sqlite3
import tempfile
from collections.abc import Iterable, Iterator
from pathlib import Path

from watcher.errors import StoreError

FIELDS = ("zone", "sensor", "signal", "ts", "value", "topic")
#: Pages SQLite may keep in memory for this file and its sorter (negative: KiB), about 16 MiB.
CACHE_KIB = 16 * 1024


class Staging:
    def __init__(self, beside: str | Path):
        folder = Path(beside).resolve().parent
        try:
            folder.mkdir(parents=True, exist_ok=True)  # as the store makes it for a first database
            self._dir = tempfile.TemporaryDirectory(prefix=".watcher-staging-", dir=folder)
            self.conn = sqlite3.connect(Path(self._dir.name) / "stage.db", isolation_level=None)
            for pragma in (
                "journal_mode = OFF",
                "synchronous = OFF",
                f"cache_size = -{CACHE_KIB}",
                "temp_store = FILE",
            ):
                self.conn.execute(f"PRAGMA {pragma}")
            self.conn.execute(
                "CREATE TABLE stage (zone TEXT NOT NULL, sensor TEXT NOT NULL, signal TEXT NOT NULL, "
                "ts REAL NOT NULL, value REAL NOT NULL, topic TEXT NOT NULL)"
            )
        except (OSError, sqlite3.Error) as exc:
            raise StoreError(f"{folder}: cannot make a staging file beside the database ({exc})") from exc
        self.count = 0

    def add(self, rows: Iterable[tuple], chunk: int = 20_000) -> None:
        """Append (zone, sensor, signal, ts, value, topic) rows, a chunk per transaction."""
        buf: list[tuple] = []
        for row in rows:
            buf.append(row)
            if len(buf) >= chunk:
                self._write(buf)
                buf = []
        if buf:
            self._write(buf)

    def _write(self, buf: list[tuple]) -> None:
        self.conn.execute("BEGIN")
        self.conn.executemany("INSERT INTO stage VALUES (?, ?, ?, ?, ?, ?)", buf)
        self.conn.execute("COMMIT")
        self.count += len(buf)

    def in_time_order(self, batch: int) -> Iterator[list[tuple]]:
        """The rows in time order (ties in the order they came), `batch` at a time."""
        cur = self.conn.execute(f"SELECT {', '.join(FIELDS)} FROM stage ORDER BY ts, rowid")
        while rows := cur.fetchmany(batch):
            yield rows

    def close(self) -> None:
        self.conn.close()
        self._dir.cleanup()

    def __enter__(self) -> Staging:
        return self

    def __exit__(self, *exc) -> None:
        self.close()
