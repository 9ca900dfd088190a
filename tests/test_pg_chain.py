"""The hash chains on PostgreSQL, before the store moves there (issue: many sites, one view):
what watcher hashes at insert must be what it reads back, so a chain verifies the same on
either engine. A real PostgreSQL server (tests/pgserver.py), psycopg 3."""

from __future__ import annotations

import json
import sqlite3

import psycopg
import pytest

from watcher.store.hashing import ReadingHasher, chain_hash

#: Awkward floats a reading can carry: signed zero, the smallest and largest doubles, a sum
#: that is not its decimal, microsecond timestamps, a value just under a round number.
VALUES = [-0.0, 0.0, 5e-324, 2.2250738585072014e-308, 1.7976931348623157e308, 0.1 + 0.2, -25.049999999999997, 1e-7]
TIMES = [1795000000.123456, 1795000000.000001, 1795000060.0, 1.7950000001e9]


@pytest.fixture(scope="module")
def pg(pg_server):
    """The session's server, through a database of this module's own."""
    return pg_server.new_database("chain_round_trips"), pg_server.password


def rows():
    out = []
    for i, value in enumerate(VALUES):
        ts = TIMES[i % len(TIMES)]
        out.append(("bulk-a", f"s{i}", "air_c", ts, value, ts + 0.25, f"kestrel/bulk-a/s{i}/air", i % 2))
    return out


def test_a_reading_hashes_the_same_read_back_from_postgresql_and_sqlite(pg):
    """Each row's chain hash made at insert equals the hash of the row as PostgreSQL gives it
    back (double precision, text, integer columns; psycopg 3), and as SQLite gives it back,
    through the fast hasher and the general one alike (derived: the chain's definition)."""
    want, prev = [], None
    hasher = ReadingHasher()
    for row in rows():
        prev = hasher(prev, *row)
        want.append(prev)
    create = (
        "CREATE TABLE r (id {id}, zone TEXT NOT NULL, sensor TEXT NOT NULL, signal TEXT NOT NULL, "
        "ts {real} NOT NULL, value {real} NOT NULL, received_ts {real} NOT NULL, topic TEXT NOT NULL, late INTEGER NOT NULL)"
    )
    with psycopg.connect(pg[0], password=pg[1]) as conn:
        conn.execute(create.format(id="BIGINT GENERATED ALWAYS AS IDENTITY PRIMARY KEY", real="DOUBLE PRECISION"))
        with conn.cursor() as cur:
            cur.executemany(
                "INSERT INTO r (zone, sensor, signal, ts, value, received_ts, topic, late) "
                "VALUES (%s, %s, %s, %s, %s, %s, %s, %s)",
                rows(),
            )
        back_pg = conn.execute(
            "SELECT zone, sensor, signal, ts, value, received_ts, topic, late FROM r ORDER BY id"
        ).fetchall()
    lite = sqlite3.connect(":memory:")
    lite.execute(create.format(id="INTEGER PRIMARY KEY", real="REAL"))
    lite.executemany(
        "INSERT INTO r (zone, sensor, signal, ts, value, received_ts, topic, late) VALUES (?,?,?,?,?,?,?,?)", rows()
    )
    back_lite = lite.execute(
        "SELECT zone, sensor, signal, ts, value, received_ts, topic, late FROM r ORDER BY id"
    ).fetchall()
    for back in (back_pg, back_lite):
        fast, general, prev_f, prev_g = [], [], None, None
        hasher = ReadingHasher()
        for row in back:
            prev_f, prev_g = hasher(prev_f, *row), chain_hash(prev_g, *row)
            fast.append(prev_f)
            general.append(prev_g)
        assert fast == want and general == want


def test_a_log_detail_reads_back_as_written_from_text_not_from_jsonb(pg):
    """The logs hash their JSON detail as written. A text column gives it back byte for byte;
    jsonb gives back its own form (keys reordered, spaces changed), which would break every
    log's chain: the PostgreSQL schema keeps details as text and merges them in Python."""
    detail = json.dumps({"source": "inferred", "cost": "final", "excess_um": 0.0123, "b": [1, 2]})
    with psycopg.connect(pg[0], password=pg[1]) as conn:
        as_text = conn.execute("SELECT %s::text", (detail,)).fetchone()[0]
        as_jsonb = conn.execute("SELECT (%s::jsonb)::text", (detail,)).fetchone()[0]
    assert chain_hash(None, 1, "set", as_text) == chain_hash(None, 1, "set", detail)
    assert chain_hash(None, 1, "set", as_jsonb) != chain_hash(None, 1, "set", detail)
