"""The base of every repository: one kind of record's SQL, on the store's connection.

A repository never opens, commits or rolls back: `Store.atomic` owns the transaction, so any
mix of repository calls inside it commits together or not at all. Every public method (a
generator as its rows come) translates the drivers' errors into the error tree as they leave it
(`translate`), so no caller ever sees a library error: a storage fault is `StoreError` (the writer retries it), the
database refusing the data is `RecordRefused` (the writer sets the message aside).
"""

from __future__ import annotations

import contextlib
import functools
import inspect
import re
import sqlite3
import sys

from watcher.errors import RecordRefused, StoreError, WatcherError


def _psycopg():
    """The PostgreSQL driver if a record on PostgreSQL has been opened (none of its errors can
    arise otherwise; a SQLite site never pays for importing it)."""
    return sys.modules.get("psycopg")


def is_db_error(exc: BaseException) -> bool:
    """An error raised by either engine's driver."""
    pg = _psycopg()
    return isinstance(exc, sqlite3.Error) or (pg is not None and isinstance(exc, pg.Error))


def is_storage_fault(exc: BaseException) -> bool:
    """sqlite3's operational errors and OS errors are the storage's; integrity, interface and
    programming errors (a value that cannot be bound, a broken constraint) are the data's.
    On PostgreSQL the server's operational errors (gone, disk full, out of connections), a
    broken or read-only session and a transaction the server aborted are the storage's; data,
    integrity and programming errors are the data's."""
    if isinstance(exc, StoreError):
        return True
    if isinstance(exc, (sqlite3.OperationalError, OSError)):
        return True
    pg = _psycopg()
    if pg is not None:
        if isinstance(exc, (pg.OperationalError, pg.InterfaceError, pg.InternalError)):
            return True
        if type(exc) is pg.DatabaseError:
            return True
    return type(exc) in (sqlite3.DatabaseError, sqlite3.InternalError)


def translate(exc: Exception, where: str) -> WatcherError | None:
    """The error tree's counterpart of a library error raised by the database (None: not one)."""
    if isinstance(exc, WatcherError):
        return exc
    if is_storage_fault(exc):
        return StoreError(f"{where}: {type(exc).__name__}: {exc}")
    if is_db_error(exc):
        return RecordRefused(f"{where}: {type(exc).__name__}: {exc}")
    return None


@contextlib.contextmanager
def _translating(self, method):
    """A driver's or the OS's error leaving a repository method, as the error tree's."""
    try:
        yield
    except Exception as exc:
        if not (isinstance(exc, OSError) or is_db_error(exc)):
            raise
        raise translate(exc, f"{type(self).__name__.lower()}.{method.__name__}") from exc


def _translated(method):
    if inspect.isgeneratorfunction(method):  # the rows come while the caller iterates

        @functools.wraps(method)
        def rows(self, *args, **kwargs):
            with _translating(self, method):
                yield from method(self, *args, **kwargs)

        return rows

    @functools.wraps(method)
    def call(self, *args, **kwargs):
        with _translating(self, method):
            return method(self, *args, **kwargs)

    return call


class Repo:
    def __init__(self, conn: sqlite3.Connection):
        self.conn = conn

    def __init_subclass__(cls, **kwargs):
        super().__init_subclass__(**kwargs)
        for name, member in list(vars(cls).items()):
            if inspect.isfunction(member) and not name.startswith("_"):
                setattr(cls, name, _translated(member))


def text(s: str) -> str:
    """Text both engines store as UTF-8: lone surrogates become backslash escapes, and so does
    NUL (PostgreSQL's text cannot hold it)."""
    return s.encode("utf-8", "backslashreplace").decode("utf-8").replace("\x00", "\\x00")


def is_url(location: str) -> bool:
    """A PostgreSQL URL (the record is on a server), not a file path."""
    return location.startswith(("postgresql://", "postgres://"))


def redact(location: str) -> str:
    """A record's location fit for a message: any password in a URL replaced (there should be none)."""
    return re.sub(r"(://[^:/@]+):[^@/]*@", r"\1:***@", location)


def is_pg(conn) -> bool:
    """The record is on PostgreSQL (store/pg.py), not a SQLite file."""
    return getattr(conn, "dialect", "sqlite") == "postgresql"


def stream(conn, sql: str, params=()):
    """Iterate over a big query's rows without holding them all: SQLite's cursor steps through
    them already; PostgreSQL's answer comes through a server-side cursor (store/pg.py)."""
    if is_pg(conn):
        return conn.stream(sql, params)
    return conn.execute(sql, params)


def hold(conn, name: str) -> None:
    """Lock name until the transaction ends, where several writers share the record
    (PostgreSQL); SQLite has one writer a file, whose transaction already excludes the rest."""
    if is_pg(conn):
        conn.lock(name)


def data_version(conn) -> int:
    """Changes when another connection has committed to the record since (SQLite's
    data_version). On PostgreSQL the cached chain heads and bin sums it guards belong to zones
    this connection has claimed (`claim_zone`): no other connection writes them."""
    if is_pg(conn):
        return 0
    return conn.execute("PRAGMA data_version").fetchone()[0]


def claim_zone(conn, zone: str) -> None:
    """One writer a zone: its readings' chain is extended from the head this connection keeps.
    SQLite has one writer a file; on PostgreSQL several central watchers share the record, so
    the first to write a zone holds it until it disconnects, and another is refused, by name."""
    if is_pg(conn) and not conn.claim(f"zone:{zone}"):
        raise StoreError(
            f"zone {zone!r} is being written by another watcher on this record: each zone must be read by one "
            "central watcher only (split the sites between them, docs/fleet.md)"
        )


def file_path(conn) -> str | None:
    """The record's file (None: in memory, or on a server)."""
    if is_pg(conn):
        return None
    return conn.execute("PRAGMA database_list").fetchone()[2] or None


def marks(n: int) -> str:
    """n comma-separated placeholders."""
    return ", ".join("?" * n)


@functools.cache
def upsert(table: str, columns: str, key: str) -> str:
    """Insert a row, or replace the other columns of the row with the same key: standard SQL
    (SQLite 3.24+, PostgreSQL) where SQLite's INSERT OR REPLACE is its own. columns and key are
    comma-separated names; every column is given a value."""
    names = [c.strip() for c in columns.split(",")]
    keys = {k.strip() for k in key.split(",")}
    sets = ", ".join(f"{c} = excluded.{c}" for c in names if c not in keys)
    return (
        f"INSERT INTO {table} ({', '.join(names)}) VALUES ({marks(len(names))}) ON CONFLICT({key}) DO UPDATE SET {sets}"
    )
