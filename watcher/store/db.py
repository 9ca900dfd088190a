"""The store: one SQLite database through sqlite-utils, and the repositories that own its SQL.

WAL mode with synchronous=FULL on every connection, so a committed batch survives power loss
before its MQTT acknowledgement goes out. One writer connection (owned by the writer thread);
readers (status, reports) open their own read-only connections. A busy timeout lets the writer
wait out an online backup instead of failing.

Callers reach the records as `store.<noun>.<verb>(...)`: `store.readings.add`,
`store.alerts.list`, `store.lots.overview`, ... and group writes with `with store.atomic():`.
Nothing outside this package sees a connection or writes SQL (tests/test_layers.py checks).
"""

from __future__ import annotations

import os
import sqlite3
from contextlib import contextmanager
from pathlib import Path

import sqlite_utils

from watcher.errors import StoreError
from watcher.store import chain, partitions
from watcher.store.alerts import Alerts, Commands, Events
from watcher.store.aliases import Aliases
from watcher.store.lots import Lots
from watcher.store.outbox import Outbox
from watcher.store.readings import Held, Readings, Rejections
from watcher.store.record import Record
from watcher.store.repo import is_url, redact, translate
from watcher.store.reports import Reports
from watcher.store.schema import migrations
from watcher.store.zones import Daily, Gaps, Snapshots, Zones

BUSY_TIMEOUT_MS = 30_000


def _connect(path: str, readonly: bool) -> sqlite3.Connection:
    if readonly:
        uri = Path(path).resolve().as_uri() + "?mode=ro"
        conn = sqlite3.connect(uri, uri=True, timeout=BUSY_TIMEOUT_MS / 1000, check_same_thread=False)
    else:
        # Built by the main thread, then used only by the writer thread that owns it.
        conn = sqlite3.connect(path, timeout=BUSY_TIMEOUT_MS / 1000, isolation_level=None, check_same_thread=False)
    conn.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
    return conn


def _check_schema(db: sqlite_utils.Database, path: str) -> None:
    """A reader (status, alerts, verify, reports) never migrates: it says so when the file's
    schema is not this version's, instead of failing on a missing column."""
    applied = [m.name for m in migrations.applied(db)]
    if not applied:
        return  # not written by watcher yet: reads say what is missing
    ours = {m.name for m in migrations._migrations}  # sqlite-utils has no public list of a set's names
    newer = [name for name in applied if name not in ours]
    if newer:
        raise StoreError(f"{path}: written by a newer watcher (schema {newer[-1]}); read it with that version")
    pending = [m.name for m in migrations.pending(db)]
    if pending:
        raise StoreError(
            f"{path}: written by an older watcher (schema {applied[-1]}, this version reads {pending[-1]}); "
            "start the service once (systemctl restart watcher, or watcher run) and it brings the database up to date"
        )


def pending_migrations(path: str) -> list[str]:
    """The schema steps a writer would apply to this file now (none for a new file): a long
    one (m016 on a big record takes minutes) lets the service tell systemd to wait. A
    PostgreSQL record has none (it is made in its final shape)."""
    if is_url(path) or not Path(path).is_file():
        return []
    try:
        conn = _connect(path, readonly=True)
        try:
            db = sqlite_utils.Database(conn)
            return [m.name for m in migrations.pending(db)] if migrations.applied(db) else []
        finally:
            conn.close()
    except sqlite3.Error:
        return []  # the writer's own open says what is wrong


class Store:
    """The writer's handle (or, with readonly=True, a reader's): one connection, its repositories.

    `path` is a SQLite file, or a PostgreSQL URL (postgresql://user@host:port/database, no
    password in it: `password`, from the configuration's password file or credential, or
    libpq's own ~/.pgpass and PGPASSFILE)."""

    def __init__(self, path: str, readonly: bool = False, password: str | None = None):
        self.path = path
        if is_url(path):
            self._open_pg(path, readonly, password)
        else:
            self._open_sqlite(path, readonly)
        conn = self.conn
        self.readings, self.rejections, self.held = Readings(conn), Rejections(conn), Held(conn)
        if self.db is None:  # a new session after the server dropped one: cached heads name nothing held
            conn.on_reopen.append(self.readings.forget_heads)
        self.zones, self.gaps, self.snapshots, self.daily = Zones(conn), Gaps(conn), Snapshots(conn), Daily(conn)
        self.events, self.alerts, self.commands = Events(conn), Alerts(conn), Commands(conn)
        self.outbox, self.lots, self.reports, self.record = Outbox(conn), Lots(conn), Reports(conn), Record(conn)
        self.aliases = Aliases(conn)

    @classmethod
    def configured(cls, storage, readonly: bool = False) -> Store:
        """The record a configuration's [storage] names (its url, else its file); a reader
        connects as the read-only role when there is one."""
        if readonly and storage.reader_url:
            return cls(storage.reader_url, readonly=True, password=storage.reader_password)
        if storage.url:
            return cls(storage.url, readonly=readonly, password=storage.password)
        return cls(storage.path, readonly=readonly)

    @property
    def where(self) -> str:
        """The record's name fit for a message (a URL's password, should one be there, hidden)."""
        return redact(self.path)

    def _open_pg(self, url: str, readonly: bool, password: str | None) -> None:
        import psycopg  # only a PostgreSQL record pays for the driver

        from watcher.store import pg, pg_schema

        self.db = None
        try:
            self.conn = pg.PgConnection(url, password, readonly)
        except psycopg.Error as exc:
            raise StoreError(f"{redact(url)}: cannot open the database ({str(exc).strip()})") from exc
        try:
            if readonly:
                pg_schema.check(self.conn, redact(url))
            else:
                pg_schema.apply(self.conn, redact(url))
        except psycopg.Error as exc:
            self.conn.close()
            raise StoreError(f"{redact(url)}: cannot open the database ({str(exc).strip()})") from exc
        except StoreError:
            self.conn.close()
            raise

    def _open_sqlite(self, path: str, readonly: bool) -> None:
        try:
            if not readonly:
                Path(path).parent.mkdir(parents=True, exist_ok=True)
                if not Path(path).exists():  # the record: owner only (WAL and SHM files follow its mode)
                    os.close(os.open(path, os.O_CREAT | os.O_WRONLY, 0o600))
            elif not Path(path).is_file():
                raise StoreError(f"{path}: no database here yet (has `watcher run` or `watcher replay` written one?)")
            self.conn = _connect(path, readonly)
            chain.register(self.conn)
            self.db = sqlite_utils.Database(self.conn)
            if not readonly:
                self.conn.execute("PRAGMA journal_mode = WAL")
                self.conn.execute("PRAGMA synchronous = FULL")
                migrations.apply(self.db)
            else:
                _check_schema(self.db, path)
        except (sqlite3.Error, OSError) as exc:
            raise StoreError(f"{path}: cannot open the database ({exc})") from exc

    def close(self) -> None:
        self.conn.close()

    # --- writing -------------------------------------------------------------------------
    @contextmanager
    def retention_pass(self):
        """Around one retention pass (the engine's apply_retention). On SQLite nothing: each
        zone's fold commits on its own. On PostgreSQL the pass is one transaction (each zone's
        fold a savepoint in it) that ends by dropping the months of raw readings it folded
        whole (store/partitions.py)."""
        if self.db is not None:
            yield
            return
        with self.atomic():
            self.conn.lock("retention")  # one pass at a time on a shared record: no two wait on each other
            self.readings.retention = partitions.Pass()
            try:
                yield
                self.readings.retention.settle(self.conn)
            finally:
                self.readings.retention = None

    @contextmanager
    def atomic(self):
        """One transaction. A storage fault inside it (disk full, locked past the busy timeout,
        I/O error, a read-only or vanished file) leaves as StoreError; the database refusing
        the data (a constraint, a value it cannot bind) as RecordRefused; other errors pass
        through unchanged: they belong to the data being written, not to the storage."""
        try:
            if self.db is not None:
                with self.db.atomic():
                    yield
            else:
                with self.conn.transaction():
                    yield
        except Exception as exc:
            self.readings.forget_heads()  # rolled back: cached chain heads may name lost rows
            mine = translate(exc, self.where)
            if mine is None or mine is exc:
                raise
            raise mine from exc
