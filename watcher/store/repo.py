"""The base of every repository: one kind of record's SQL, on the store's connection.

A repository never opens, commits or rolls back: `Store.atomic` owns the transaction, so any
mix of repository calls inside it commits together or not at all. Every public method
translates sqlite3's errors into the error tree as they leave it (`translate`), so no caller
ever sees a library error: a storage fault is `StoreError` (the writer retries it), the
database refusing the data is `RecordRefused` (the writer sets the message aside).
"""

from __future__ import annotations

import functools
import inspect
import sqlite3

from watcher.errors import RecordRefused, StoreError, WatcherError


def is_storage_fault(exc: BaseException) -> bool:
    """sqlite3's operational errors and OS errors are the storage's; integrity, interface and
    programming errors (a value that cannot be bound, a broken constraint) are the data's."""
    if isinstance(exc, StoreError):
        return True
    if isinstance(exc, (sqlite3.OperationalError, OSError)):
        return True
    return type(exc) in (sqlite3.DatabaseError, sqlite3.InternalError)


def translate(exc: Exception, where: str) -> WatcherError | None:
    """The error tree's counterpart of a library error raised by the database (None: not one)."""
    if isinstance(exc, WatcherError):
        return exc
    if is_storage_fault(exc):
        return StoreError(f"{where}: {type(exc).__name__}: {exc}")
    if isinstance(exc, sqlite3.Error):
        return RecordRefused(f"{where}: {type(exc).__name__}: {exc}")
    return None


def _translated(method):
    @functools.wraps(method)
    def call(self, *args, **kwargs):
        try:
            return method(self, *args, **kwargs)
        except (sqlite3.Error, OSError) as exc:
            raise translate(exc, f"{type(self).__name__.lower()}.{method.__name__}") from exc

    return call


class Repo:
    def __init__(self, conn: sqlite3.Connection):
        self.conn = conn

    def __init_subclass__(cls, **kwargs):
        super().__init_subclass__(**kwargs)
        for name, member in list(vars(cls).items()):
            if inspect.isfunction(member) and not name.startswith("_") and not inspect.isgeneratorfunction(member):
                setattr(cls, name, _translated(member))


def text(s: str) -> str:
    """Text SQLite can store as UTF-8: lone surrogates become backslash escapes."""
    return s.encode("utf-8", "backslashreplace").decode("utf-8")


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
