"""The PostgreSQL schema (store/pg_schema.py) against SQLite's after its last migration, on a
real PostgreSQL server: the same tables, columns (type, NOT NULL, default), indexes and view,
so a SQLite migration without its PostgreSQL counterpart fails here; and the view's rows can
be changed and deleted as on SQLite."""

from __future__ import annotations

import psycopg
import pytest

from watcher.store import partitions, pg_schema
from watcher.store.db import Store
from watcher.store.schema import migrations

TYPES = {"INTEGER": "bigint", "REAL": "double precision", "TEXT": "text", "BLOB": "bytea"}


@pytest.fixture(scope="module")
def pg(pg_server):
    """(url, password) of a database of this module's own on the session's server, holding
    the PostgreSQL shape as pg_schema makes it."""
    url = pg_server.new_database("schema_parity")
    with psycopg.connect(url, password=pg_server.password) as conn:
        with conn.transaction():
            for sql in pg_schema.statements():
                conn.execute(sql)
    return url, pg_server.password


def connect(pg):
    return psycopg.connect(pg[0], password=pg[1])


@pytest.fixture(scope="module")
def lite(tmp_path_factory):
    store = Store(str(tmp_path_factory.mktemp("lite") / "w.db"))
    yield store.conn
    store.close()


def sqlite_columns(conn, table: str) -> dict[str, tuple]:
    """name -> (type, not null, default) as SQLite declares them (a rowid primary key is not null)."""
    out = {}
    for _, name, kind, notnull, default, pk in conn.execute(f"PRAGMA table_info({table})"):
        out[name] = (TYPES[kind], bool(notnull or pk), default)
    return out


def pg_columns(conn, table: str) -> dict[str, tuple]:
    rows = conn.execute(
        "SELECT column_name, data_type, is_nullable, column_default, is_identity FROM information_schema.columns "
        "WHERE table_name = %s",
        (table,),
    ).fetchall()
    return {
        name: (kind, nullable == "NO", None if identity == "YES" else default)
        for name, kind, nullable, default, identity in rows
    }


def test_the_level_is_sqlites_last_migration():
    """The PostgreSQL shape says which SQLite migration it equals, and that is the last one."""
    assert pg_schema.SCHEMA_LEVEL == migrations._migrations[-1].name


def test_every_table_and_column_matches_sqlite(pg, lite):
    """Same tables; each column with the mapped type, the same NOT NULL and the same default
    (PostgreSQL writes defaults with a cast: '{}'::text for '{}')."""
    tables = {
        r[0]
        for r in lite.execute("SELECT name FROM sqlite_master WHERE type = 'table' AND name NOT LIKE 'sqlite_%'")
        if r[0] != "_sqlite_migrations"
    }
    assert tables == set(pg_schema.TABLES)
    with connect(pg) as conn:
        for table in sorted(tables):
            want = sqlite_columns(lite, table)
            if table == "chain_folds":  # addressed by rowid in SQLite; a column of that name here
                want["rowid"] = ("bigint", True, None)
            got = pg_columns(conn, table)
            assert set(got) == set(want), table
            for name, (kind, notnull, default) in want.items():
                g_kind, g_notnull, g_default = got[name]
                assert (g_kind, g_notnull) == (kind, notnull), (table, name)
                if default is not None:
                    assert g_default is not None and g_default.split("::")[0] == default, (table, name, g_default)
                else:
                    assert g_default is None, (table, name, g_default)


def test_every_index_matches_sqlite(pg, lite):
    """The same named indexes, on the same columns, unique and partial alike (the indexes behind
    primary keys and UNIQUE constraints are the tables' own, compared with the columns)."""
    want = {
        name: sql
        for name, sql in lite.execute("SELECT name, sql FROM sqlite_master WHERE type = 'index' AND sql IS NOT NULL")
        if not name.startswith("idx__sqlite_migrations")
    }
    with connect(pg) as conn:
        got = dict(
            conn.execute(
                "SELECT indexname, indexdef FROM pg_indexes WHERE schemaname = 'public' "
                "AND indexname NOT IN (SELECT conname FROM pg_constraint)"  # primary keys and UNIQUE (...)
            ).fetchall()
        )
    assert set(got) == set(want)
    for name, sql in want.items():
        assert ("UNIQUE" in sql) == ("UNIQUE" in got[name]), name
        assert ("WHERE" in sql) == ("WHERE" in got[name]), name
        columns = sql.split("(", 1)[1].split(")")[0].replace(" ", "")
        assert columns == got[name].split("(", 1)[1].split(")")[0].replace(" ", ""), name


def test_the_readings_view_reads_and_changes_as_on_sqlite(pg, lite):
    """The readings view has SQLite's columns; an update and a delete through it reach reading_rows."""
    want = [r[1] for r in lite.execute("PRAGMA table_info(readings)")]
    with connect(pg) as conn:
        got = [r[0] for r in conn.execute("SELECT * FROM readings LIMIT 0").description]
        assert got == want
        conn.execute("INSERT INTO series (zone, sensor, signal) VALUES ('bulk-a', 's1', 'air_c')")
        conn.execute("INSERT INTO topics (topic) VALUES ('kestrel/bulk-a/s1/air')")
        lo, hi = partitions.bounds(1970, 1)  # raw readings live in monthly partitions
        conn.execute(
            f"CREATE TABLE {partitions.name(1970, 1)} PARTITION OF reading_rows FOR VALUES FROM ({lo}) TO ({hi})"
        )
        for k in range(3):
            conn.execute(
                "INSERT INTO reading_rows (series, ts, value, received_ts, topic) VALUES (1, %s, -25.0, %s, 1)",
                (60.0 * k, 60.0 * k + 1),
            )
        conn.execute("UPDATE readings SET late = 1, chain = 'h' WHERE ts = 60.0")
        conn.execute("DELETE FROM readings WHERE ts = 120.0")
        rows = conn.execute("SELECT ts, late, chain FROM reading_rows ORDER BY ts").fetchall()
        assert rows == [(0.0, 0, None), (60.0, 1, "h")]
        assert conn.execute("SELECT zone, topic FROM readings WHERE ts = 0").fetchone() == (
            "bulk-a",
            "kestrel/bulk-a/s1/air",
        )
        conn.rollback()
