"""The record on PostgreSQL (a fleet's central record, docs/fleet.md): psycopg 3 behind the
part of sqlite3's connection the repositories use, so they keep one set of statements.

What differs is kept here, not in the repositories: placeholders (`?` and `:name` become
psycopg's), `INSERT OR IGNORE` (ON CONFLICT DO NOTHING), `CAST(x AS INTEGER)` (SQLite
truncates, PostgreSQL rounds: trunc first), a cursor's `lastrowid` (the session's lastval()),
`total_changes` (summed from row counts), and `BEGIN` on a reader's connection (a repeatable
read snapshot, as a SQLite read transaction is). Everything else the repositories run is
standard SQL both engines take; tests/test_store_engines.py runs the repositories on both.

The connection commits each statement unless a transaction is open (`Store.atomic` opens one
through `transaction()`, nested ones are savepoints), and synchronous_commit is on for the
writer: a batch is on the server's disk before its MQTT acknowledgement goes out. A reader's
session is read-only (default_transaction_read_only) whatever its role may do. A session the
server dropped (a restart, a failover, the network) is opened again at the next statement
outside a transaction, or the next transaction: never in the middle of one, whose statements
would otherwise commit one by one.
"""

from __future__ import annotations

import contextlib
import functools
import re
import zlib
from contextlib import contextmanager

import numpy as np
import psycopg
from psycopg.adapt import Dumper, Loader
from psycopg.pq import TransactionStatus

STREAM_ROWS = 20_000  # rows a round trip when streaming
_TOKENS = re.compile(r"'(?:[^']|'')*'|\"(?:[^\"]|\"\")*\"|\$\$.*?\$\$|::|\?|:[A-Za-z_]\w*|%", re.S)
_CAST_INT = re.compile(r"CAST\(((?:[^()]|\([^()]*\))*?) AS INTEGER\)", re.I)
_OR_IGNORE = re.compile(r"^\s*INSERT\s+OR\s+IGNORE\s+INTO\b", re.I)


def _token(m: re.Match) -> str:
    t = m.group()
    if t == "?":
        return "%s"
    if t.startswith(":") and t != "::":
        return f"%({t[1:]})s"
    return t.replace("%", "%%")  # psycopg reads % everywhere, in literals too


@functools.lru_cache(maxsize=2048)
def statement(sql: str) -> str:
    """A repository's statement as psycopg runs it on PostgreSQL."""
    out = _TOKENS.sub(_token, sql)
    out = _CAST_INT.sub(r"CAST(trunc(\1) AS BIGINT)", out)
    if _OR_IGNORE.match(out):
        out = _OR_IGNORE.sub("INSERT INTO", out).rstrip().rstrip(";") + " ON CONFLICT DO NOTHING"
    return out


class _IntFromBool(Dumper):
    """A Python (or numpy) bool as the 0/1 integer SQLite stores: the record has no boolean
    columns, and a flag's value is hashed as the integer read back."""

    oid = psycopg.adapters.types["int8"].oid

    def dump(self, obj) -> bytes:
        return b"1" if obj else b"0"


class _NumericAsNumber(Loader):
    """numeric (what sum() and count arithmetic of integers give on PostgreSQL) as the int or
    float SQLite would give, never a Decimal."""

    def load(self, data) -> int | float:
        text = bytes(data)
        if text.lstrip(b"-").isdigit():
            return int(text)
        return float(text)


class Cursor:
    """A psycopg cursor with sqlite3's lastrowid (read right after the INSERT that made it)."""

    def __init__(self, conn: PgConnection, cur: psycopg.Cursor, serial: int):
        self._conn, self._cur, self._serial = conn, cur, serial

    @property
    def rowcount(self) -> int:
        return self._cur.rowcount

    @property
    def description(self):
        return self._cur.description

    @property
    def lastrowid(self) -> int:
        if self._serial != self._conn.serial:
            raise RuntimeError("lastrowid read after another statement ran on the connection")
        return self._conn.raw.execute("SELECT lastval()").fetchone()[0]

    def fetchone(self):
        return self._cur.fetchone() if self._cur.description else None

    def fetchall(self) -> list:
        return self._cur.fetchall() if self._cur.description else []

    def __iter__(self):
        return iter(self._cur) if self._cur.description else iter(())


class PgConnection:
    """One psycopg connection, spoken to as the repositories speak to sqlite3."""

    dialect = "postgresql"

    def __init__(self, url: str, password: str | None = None, readonly: bool = False):
        self.url, self.readonly = url, readonly
        self._password = password
        self.serial = 0
        self.total_changes = 0
        self.depth = 0  # transactions open through transaction()
        self.on_reopen: list = []  # called after a new session replaced a dropped one
        self.raw = self._open()

    def _open(self) -> psycopg.Connection:
        options = "-c default_transaction_read_only=on" if self.readonly else "-c synchronous_commit=on"
        kwargs = {"password": self._password} if self._password else {}
        raw = psycopg.connect(self.url, autocommit=True, application_name="watcher", options=options, **kwargs)
        raw.adapters.register_dumper(bool, _IntFromBool)
        raw.adapters.register_dumper(np.bool_, _IntFromBool)
        raw.adapters.register_loader("numeric", _NumericAsNumber)
        return raw

    @property
    def broken(self) -> bool:
        """The server went away (restart, network): the writer reopens before its next batch."""
        return self.raw.closed or self.raw.broken

    def reopen(self) -> None:
        """A new session for a dropped one; what was kept about the old one (chain heads, zones
        held, partitions seen) is forgotten through on_reopen."""
        try:
            self.raw.close()
        finally:
            self.raw = self._open()
        for forget in self.on_reopen:
            forget()

    def _alive(self) -> None:
        if self.depth == 0 and self.broken:
            self.reopen()

    @contextmanager
    def transaction(self):
        """One transaction (a savepoint inside another)."""
        self._alive()
        self.depth += 1
        try:
            with self.raw.transaction():
                yield
        finally:
            self.depth -= 1

    @property
    def in_transaction(self) -> bool:
        return self.raw.info.transaction_status != TransactionStatus.IDLE

    def execute(self, sql: str, params=()) -> Cursor:
        self._alive()
        if self.readonly and sql.strip().upper() == "BEGIN":
            sql = "BEGIN ISOLATION LEVEL REPEATABLE READ"
        cur = self.raw.cursor()
        cur.execute(statement(sql), params if params is not None else ())  # () too: %% is read as %
        self.serial += 1
        if cur.rowcount > 0 and cur.description is None:
            self.total_changes += cur.rowcount
        return Cursor(self, cur, self.serial)

    def executemany(self, sql: str, rows) -> Cursor:
        self._alive()
        cur = self.raw.cursor()
        cur.executemany(statement(sql), list(rows))
        self.serial += 1
        if cur.rowcount > 0:
            self.total_changes += cur.rowcount
        return Cursor(self, cur, self.serial)

    def stream(self, sql: str, params=()):
        """The rows of a big query, a batch at a time through a server-side cursor (a client
        cursor holds the whole answer in memory: a verify of a year's readings would not fit).
        Inside the caller's transaction if one is open, else in one of its own."""
        self._alive()
        self.serial += 1
        name = f"watcher_stream_{self.serial}"
        with contextlib.ExitStack() as stack:
            if not self.in_transaction:
                stack.enter_context(self.transaction())
            cur = stack.enter_context(self.raw.cursor(name=name))
            cur.itersize = STREAM_ROWS
            cur.execute(statement(sql), params if params is not None else ())
            yield from cur

    def lock(self, name: str) -> None:
        """Hold a lock called name until the transaction ends (appends to a shared chain)."""
        self.raw.execute("SELECT pg_advisory_xact_lock(%s)", (_key(name),))

    def claim(self, name: str) -> bool:
        """Hold a lock called name for as long as this connection lives; False when another
        connection holds it."""
        return bool(self.raw.execute("SELECT pg_try_advisory_lock(%s)", (_key(name),)).fetchone()[0])

    def close(self) -> None:
        self.raw.close()


def _key(name: str) -> int:
    """A stable 63-bit advisory lock key for a name."""
    return (zlib.crc32(name.encode()) << 31) ^ zlib.adler32(name.encode())
