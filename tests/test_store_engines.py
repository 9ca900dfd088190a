"""The store on both engines: a SQLite file (a site) and a real PostgreSQL server (a fleet's
central record, tests/pgserver.py). The same repositories, the same statements: what one
engine records, the other records the same, row for row and hash for hash, and `verify`
finds the same edits on both."""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
import threading

import pytest

from tests.test_engine import NOW, T0, make, msg
from tests.test_integrity import an_alert
from tests.test_service import status_json
from watcher.engine.batch import Engine, Message
from watcher.engine.lots import record_event
from watcher.errors import RecordRefused, StoreError
from watcher.store import chain, partitions, pg_schema
from watcher.store.db import Store

ENGINES = ("sqlite", "postgresql")
LATER = NOW + 400 * 86400.0


def _location(engine: str, request, tmp_path) -> tuple[str, str | None]:
    if engine == "sqlite":
        return str(tmp_path / "record.db"), None
    return request.getfixturevalue("pg_record")


@pytest.fixture(params=ENGINES)
def opener(request, tmp_path):
    """Opens the test's record (a new file, or a new PostgreSQL database): opener(readonly)."""
    location, password = _location(request.param, request, tmp_path)

    def open_it(readonly: bool = False) -> Store:
        return Store(location, readonly=readonly, password=password)

    open_it.engine, open_it.location = request.param, location
    return open_it


def fill(tmp_path, store: Store, retention: bool = True) -> None:
    """Normal work of every kind the store keeps: readings in batches and one by one, a late
    reading, refused messages (one with NUL and a lone surrogate), alerts and their log, events
    merged, lots, a retention pass over readings and rejections, held messages, the outbox,
    commands, a summary's row, zone marks, aliases."""
    (tmp_path / "cfg").mkdir()
    cfg, scratch, _ = make(tmp_path / "cfg", reorder=0.0)  # the configuration; its own file is not used
    scratch.close()
    engine = Engine(cfg, store, checkpoint_s=0.0)
    for k0 in range(0, 600, 60):
        engine.process([msg(z, k) for k in range(k0, k0 + 60) for z in ("bulk-a", "dispatch")], now=NOW)
    engine.process([msg("bulk-a", 5, value=-20.0, sensor="s2")], now=NOW)  # late: row by row
    engine.process([msg("bulk-a", 7)], now=NOW)  # already stored: answered by the natural key
    engine.process([Message("kp/bulk-a/s1/air", b'{"t": "warm"}', NOW, 1, 1)], now=NOW)
    engine.process([Message("kp/bulk-a/s1/air", b'{"t": "\x00 nul"}', NOW, 2, 1)], now=NOW)
    with store.atomic():
        store.rejections.add(NOW, "kp/\udcff/bad", "a lone surrogate in the topic", b"\xff\x00")
        an_alert(store, status="cleared", cleared_ts=5.0)
        store.alerts.log_add(1, "raise", 1.0, 2.0, 3.5)
        store.alerts.log_add(1, "clear", 5.0, 6.0, -0.0)
        store.events.upsert("bulk-a", "door", T0 + 100.0, T0 + 160.0, {"source": "signal", "n": [1, 2]})
        store.events.upsert("bulk-a", "door", T0 + 100.0, T0 + 170.0, {"cost": {"um": 0.25}, "n": None})
        for doc in (
            {"event": "arrive", "lot": "L-1", "zone": "bulk-a", "time": NOW - 3600, "initial": {"budget_used_pct": 30}},
            {"event": "move", "lot": "L-1", "zone": "dispatch", "time": NOW - 1800},
        ):
            record_event(store, cfg, doc, "test", "cli", "qa", NOW)
        store.held.add(NOW, "kp/bulk-a/s1/air", b'{"t": -25, "ts": 1}', "clock disagrees")
        store.held.add(NOW, "kp/bulk-a/s1/air", b'{"t": -25, "ts": 2}', "clock disagrees")
        store.held.remove([store.held.oldest(1)[0][0]])
        store.outbox.add("title", "body", ["alerts", "zone:bulk-a"], NOW, ["qa"], dedupe="d-1", alert_id=1)
        store.commands.add(1, "qa", "seen", "cli", None, NOW)
        store.reports.add("kp", "2026-W48", NOW, store.record.heads(), "digest", {"paths": [], "auto": True})
        store.zones.mark_set("bulk-a", "budget-50", 12.5)
        store.aliases.replace("node-1", {1: "kp/bulk-a/s1/air"})
    if retention:
        with store.atomic():  # a retention pass, a year and more on
            store.readings.fold("bulk-a", T0 + 100 * 60, LATER)
            store.rejections.prune(NOW - 1.0, LATER)  # none that old: a pass that cuts nothing
    engine.checkpoint_all(NOW)


def dump(store: Store) -> dict[str, list[tuple]]:
    """Every table's rows, in key order, columns named as on PostgreSQL (chain_folds' rowid too)."""
    out = {}
    for table in pg_schema.TABLES:
        names = COLUMNS[table]
        rows = store.conn.execute(f"SELECT {', '.join(names)} FROM {table}").fetchall()
        out[table] = sorted((tuple(r) for r in rows), key=repr)
    return out


COLUMNS = {table: re.findall(r"(?:^|, )([a-z_]+) [A-Z]", columns) for table, columns in pg_schema.TABLES.items()}


def test_the_same_work_makes_the_same_record_on_both_engines(tmp_path, pg_record):
    """The same work on a SQLite file and on PostgreSQL leaves every table equal, row for row
    and value for value (floats to the bit, bytes, JSON text), the same chain heads, and both
    records verify intact: the fleet's central record is the site's record on another engine."""
    url, password = pg_record
    stores = {"sqlite": Store(str(tmp_path / "a.db")), "postgresql": Store(url, password=password)}
    try:
        for name, store in stores.items():
            (tmp_path / name).mkdir()
            fill(tmp_path / name, store)
        dumps = {name: dump(store) for name, store in stores.items()}
        for table in pg_schema.TABLES:
            assert dumps["sqlite"][table] == dumps["postgresql"][table], table
        assert sum(len(rows) for rows in dumps["sqlite"].values()) > 1000
        assert stores["sqlite"].record.heads() == stores["postgresql"].record.heads()
        for store in stores.values():
            findings, counts = chain.verify(store.conn, now_ts=LATER)
            assert findings == [] and counts["readings/bulk-a"] == 601 - 102 and counts["chain_folds"] >= 2
    finally:
        for store in stores.values():
            store.close()


def verify_cli(location: str, pgpass) -> subprocess.CompletedProcess:
    """`watcher verify --db LOCATION`: a PostgreSQL URL's password from a libpq password file."""
    env = {**os.environ, "PGPASSFILE": str(pgpass)}
    return subprocess.run(
        [sys.executable, "-m", "watcher", "verify", "--db", location],
        capture_output=True,
        text=True,
        timeout=120,
        env=env,
    )


EDITS = {
    "reading-value": (
        "UPDATE reading_rows SET value = value + 0.5 WHERE id = (SELECT min(r.id) + 40 FROM reading_rows r "
        "JOIN series s ON s.id = r.series WHERE s.zone = 'dispatch')",
        "readings/dispatch",
    ),
    "reading-deleted": (
        "DELETE FROM reading_rows WHERE id = (SELECT min(r.id) + 100 FROM reading_rows r "
        "JOIN series s ON s.id = r.series WHERE s.zone = 'bulk-a')",
        "readings/bulk-a",
    ),
    "alert-log-by": ("UPDATE alert_log SET by = 'someone else'", "alert_log"),
    "event-end": ("UPDATE event_log SET end_ts = 999 WHERE id = 1", "event_log"),
    "lot-move-zone": ("UPDATE lot_events SET zone = 'bulk-a' WHERE kind = 'move'", "lot_events"),
    "rejection-reason": ("UPDATE rejections SET reason = 'nothing wrong' WHERE id = 1", "rejections"),
}


@pytest.mark.parametrize("edit", sorted(EDITS))
def test_verify_names_an_edit_on_either_engine(opener, tmp_path, pg_server, edit):
    """An intact record verifies (exit 0) from the command line on either engine; after a value
    is changed, a row deleted or a log rewritten behind watcher's back, verify exits 1 and names
    the chain and row (derived: the chains' definition, store/chain.py)."""
    store = opener()
    fill(tmp_path, store, retention=False)
    sql, chain_name = EDITS[edit]
    pgpass = pg_server.pgpass()
    store.close()
    intact = verify_cli(opener.location, pgpass)
    assert intact.returncode == 0 and "Record intact" in intact.stdout, intact.stdout + intact.stderr
    store = opener()
    with store.atomic():
        store.conn.execute(sql)
    store.close()
    out = verify_cli(opener.location, pgpass)
    assert out.returncode == 1, out.stdout + out.stderr
    line = next(x for x in out.stdout.splitlines() if x.startswith("MISMATCH"))
    assert line.startswith(f"MISMATCH {chain_name} row "), out.stdout


def test_a_stored_reading_is_answered_by_its_key_on_either_engine(opener, tmp_path):
    """A reading stored again is refused by its natural key, alone or in a batch (the batch
    then inserts nothing, and the caller goes row by row); nothing is counted twice, and a
    batch undone that way keeps the month it opened (PostgreSQL's partitions)."""
    store = opener()
    (tmp_path / "cfg").mkdir()
    cfg, scratch, _ = make(tmp_path / "cfg", reorder=0.0)
    scratch.close()
    engine = Engine(cfg, store, checkpoint_s=0.0)
    engine.process([msg("bulk-a", k) for k in range(10)], now=NOW)
    first = engine.store.readings.summary("bulk-a")[0]
    from watcher.ingest.payload import Reading

    again = Reading("bulk-a", "s1", "air_c", T0 + 60 * 3, -25.0)
    fresh = Reading("bulk-a", "s1", "air_c", T0 + 60 * 30, -25.0)
    next_month = Reading("bulk-a", "s1", "air_c", T0 + 40 * 86400.0, -25.0)  # a month not seen yet
    with store.atomic():
        assert store.readings.add(again, NOW, "kp/bulk-a/s1/air", False) is False
        assert store.readings.add_all_new([(fresh, NOW, "kp/bulk-a/s1/air"), (again, NOW, "kp/bulk-a/s1/air")]) is False
        assert store.readings.add_all_new([(next_month, NOW, "kp/bulk-a/s1/air"), (again, NOW, "t")]) is False
        assert store.readings.add_all_new([(fresh, NOW, "kp/bulk-a/s1/air")]) is True
        assert store.readings.add(next_month, NOW, "kp/bulk-a/s1/air", False) is True  # its month still there
    assert store.readings.summary("bulk-a")[0] == first + 2 == 12
    assert chain.verify(store.conn)[0] == []
    store.close()


# --- PostgreSQL only: what a shared server adds -------------------------------------------


def test_two_connections_extending_one_log_keep_its_chain(pg_record):
    """Two writers (central watchers, or a watcher's writer and its deliverer) appending to one
    chained log at once: each append is locked, hashed in Python onto the row that is last when
    it goes in, and the log verifies intact with every row (derived: the chain's definition)."""
    url, password = pg_record
    stores = [Store(url, password=password), Store(url, password=password)]
    errors = []

    def append(store: Store, who: str) -> None:
        try:
            for i in range(150):
                with store.atomic():
                    store.alerts.log_add(1, "note", float(i), float(i), None, who, f"{who} {i}")
        except Exception as exc:  # reported below: a thread's failure must fail the test
            errors.append(exc)

    with stores[0].atomic():
        an_alert(stores[0])
        stores[0].alerts.log_add(1, "raise", 0.0, 0.0, 1.0)
    threads = [threading.Thread(target=append, args=(s, f"w{n}")) for n, s in enumerate(stores)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(120)
    assert errors == []
    findings, counts = chain.verify(stores[0].conn)
    assert findings == [] and counts["alert_log"] == 1 + 2 * 150
    for store in stores:
        store.close()


def test_a_zone_written_by_another_watcher_is_refused(pg_record):
    """Several central watchers share one record but never one zone (its readings' chain is
    extended from the head its writer keeps): a second writer of a zone is refused, by name,
    until the first lets go; other zones are free (docs/fleet.md)."""
    from watcher.ingest.payload import Reading

    url, password = pg_record
    first, second = Store(url, password=password), Store(url, password=password)
    with first.atomic():
        first.readings.add(Reading("kestrel-bulk-a", "s1", "air_c", T0, -25.0), NOW, "t", False)
    with pytest.raises(StoreError, match="kestrel-bulk-a.*another watcher"):
        with second.atomic():
            second.readings.add(Reading("kestrel-bulk-a", "s1", "air_c", T0 + 60, -25.0), NOW, "t", False)
    with second.atomic():
        second.readings.add(Reading("harbour-store-1", "s1", "air_c", T0, -25.0), NOW, "t", False)
    first.close()
    with second.atomic():
        second.readings.add(Reading("kestrel-bulk-a", "s1", "air_c", T0 + 60, -25.0), NOW, "t", False)
    assert chain.verify(second.conn)[0] == []
    second.close()


def test_a_reader_role_reads_and_cannot_write(pg_server, pg_record, tmp_path):
    """status, verify and the page read through a read-only role (storage.reader_url): the
    record is read, any write is refused by the server, and the role's password comes from its
    file, never the configuration."""
    url, password = pg_record
    store = Store(url, password=password)
    fill(tmp_path, store, retention=False)
    store.close()
    database = url.rsplit("/", 1)[1]
    reader_url, reader_pw = pg_server.add_reader(database)
    reader = Store(reader_url, readonly=True, password=reader_pw.read_text().strip())
    assert reader.readings.summary("bulk-a")[0] == 601
    assert reader.record.verify()[0] == []
    with pytest.raises((StoreError, RecordRefused)):
        with reader.atomic():
            reader.conn.execute("DELETE FROM alert_log")
    reader.close()
    with pytest.raises(StoreError, match="watcher_reader may read this record but not write it"):
        Store(reader_url, password=reader_pw.read_text().strip())
    cfg = tmp_path / "reader.toml"
    (tmp_path / "pg-pw").write_text(password + "\n")
    (tmp_path / "pg-pw").chmod(0o600)
    cfg.write_text(
        f'[broker]\npassword_file = "{tmp_path / "cfg" / "pw"}"\n'
        f'[storage]\npath = "{tmp_path / "local.db"}"\nurl = "{url}"\npassword_file = "{tmp_path / "pg-pw"}"\n'
        f'reader_url = "{reader_url}"\nreader_password_file = "{reader_pw}"\n'
        '[[sites]]\nid = "kp"\n[[zones]]\nid = "bulk-a"\nsetpoint_c = -25.0\n[[zones]]\nid = "dispatch"\n'
        'setpoint_c = -22.0\n[[sources]]\npattern = "kp/{zone}/{sensor}/air"\nsignal = "air_c"\nvalue = "t"\n'
    )
    doc = status_json(cfg)
    assert doc["database"] == reader_url and {z["id"]: z["readings_total"] for z in doc["zones"]} == {
        "bulk-a": 601,
        "dispatch": 600,
    }
    assert password not in json.dumps(doc)


def test_a_record_of_another_version_or_none_is_refused_by_name(pg_server, pg_record):
    """A database whose record another watcher version made, or none at all for a reader, is
    refused before anything reads it, naming both versions; a wrong password is refused
    without showing it."""
    url, password = pg_record
    with pytest.raises(StoreError, match="no watcher record in this database yet"):
        Store(url, readonly=True, password=password)
    Store(url, password=password).close()
    pg_server.sql("UPDATE watcher_schema SET level = 'm099_from_the_future'", url.rsplit("/", 1)[1])
    for readonly in (False, True):
        with pytest.raises(StoreError, match=f"m099_from_the_future.*reads {pg_schema.SCHEMA_LEVEL}"):
            Store(url, readonly=readonly, password=password)
    with pytest.raises(StoreError, match="cannot open the database") as refused:
        Store(url, password="not-the-password")
    assert "not-the-password" not in str(refused.value)


def test_the_writer_carries_on_when_the_server_restarts(tmp_path):
    """The server restarts under the writer (an upgrade, a failover): the read or the batch in
    flight fails as a storage fault (the service keeps the batch and retries, unacknowledged),
    the next attempt opens a new session, and the record holds every reading once with its
    chain intact."""
    from tests.pgserver import PostgresServer

    server = PostgresServer()
    server.start()
    try:
        (tmp_path / "cfg").mkdir()
        cfg, scratch, _ = make(tmp_path / "cfg", reorder=0.0)
        scratch.close()
        store = Store(server.url, password=server.password)
        engine = Engine(cfg, store, checkpoint_s=0.0)
        engine.process([msg("bulk-a", k) for k in range(60)], now=NOW)
        server.restart()  # between batches: the next read notices, the one after has a new session
        with pytest.raises(StoreError):
            store.readings.summary("bulk-a")
        assert store.readings.summary("bulk-a")[0] == 60
        server.restart()  # under the next batch
        batch = [msg("bulk-a", k) for k in range(60, 120)]
        with pytest.raises(StoreError):
            engine.process(batch, now=NOW)
        engine.process(batch, now=NOW)  # the writer's retry of the same batch
        engine.process([msg("bulk-a", k) for k in range(120, 180)], now=NOW)
        assert store.readings.summary("bulk-a")[0] == 180
        assert chain.verify(store.conn)[0] == []
        store.close()
    finally:
        server.stop()


def six_hourly(zones, first_day: int, last_day: int) -> list:
    """(reading, received_ts, topic) of one air reading every six hours per zone, in days
    [first_day, last_day) after T0."""
    from watcher.ingest.payload import Reading

    out = []
    for k in range(first_day * 4, last_day * 4):
        ts = T0 + k * 21600.0
        for z in zones:
            out.append(
                (Reading(z, "s1", "air_c", ts, -25.0 + (3.0 if k % 4 == 1 else 0.0)), ts + 1.0, f"kp/{z}/s1/air")
            )
    return out


def retention_record(store: Store) -> float:
    """Fifteen and a half months of two zones and twelve days of a third (no longer configured,
    so retention never folds it), then one retention pass at 400 days, each zone cut as the
    engine cuts it (at its newest reading at or before the cut-off). The pass's time."""
    rows = six_hourly(["bulk-a", "dispatch"], 0, 472) + six_hourly(["retired"], 0, 12)
    rows.sort(key=lambda r: r[0].ts)
    for k in range(0, len(rows), 500):
        with store.atomic():
            assert store.readings.add_all_new(rows[k : k + 500])
    now = T0 + 472 * 86400.0
    cutoff = now - 400 * 86400.0
    with store.retention_pass():
        for zone in ("bulk-a", "dispatch"):
            cut = max(r.ts for r, _, _ in rows if r.zone == zone and r.ts <= cutoff)
            with store.atomic():
                assert store.readings.fold(zone, cut, now) > 0
    return now


def test_retention_drops_whole_months_on_postgresql_and_folds_the_same_as_sqlite(tmp_path, pg_record):
    """A retention pass over fifteen months: on PostgreSQL the months wholly before the cut-off
    are dropped as partitions (one that still holds readings of a zone no longer configured is
    thinned instead, its rows kept); the record left is the same as SQLite's after the same pass,
    table by table, with the same chain heads, and both verify intact."""
    url, password = pg_record
    stores = {"sqlite": Store(str(tmp_path / "a.db")), "postgresql": Store(url, password=password)}
    try:
        for store in stores.values():
            now = retention_record(store)
        dumps = {name: dump(store) for name, store in stores.items()}
        for table in pg_schema.TABLES:
            assert dumps["sqlite"][table] == dumps["postgresql"][table], table
        assert stores["sqlite"].record.heads() == stores["postgresql"].record.heads()
        for store in stores.values():
            assert chain.verify(store.conn, now_ts=now)[0] == []
        pg = stores["postgresql"]
        cutoff = now - 400 * 86400.0
        months = {relname: (lo, hi) for relname, lo, hi in partitions.listed(pg.conn)}
        first = partitions.name(*partitions.month_of(T0))
        assert first in months  # the retired zone's month: thinned, not dropped
        assert all(hi > cutoff for name, (lo, hi) in months.items() if name != first)  # the others before: dropped
        assert partitions.name(2026, 12) not in months  # wholly before the cut-off: dropped
        assert partitions.name(2027, 1) in months and months[partitions.name(2027, 1)][0] < cutoff  # cut inside
        zones_left = dict(
            pg.conn.execute(f"SELECT s.zone, count(*) FROM {first} r JOIN series s ON s.id = r.series GROUP BY s.zone")
        )
        assert zones_left == {"retired": 12 * 4}  # its readings all there, the folded zones' gone
    finally:
        for store in stores.values():
            store.close()


def test_a_weekly_summary_reads_the_same_from_both_engines(tmp_path, pg_record):
    """The demo site's week (defrosts, doors, a fault, a sensor outage, a refused message)
    played into a SQLite file and into PostgreSQL gives the same weekly summary, file for file
    (JSON, CSV and HTML), the chain heads it pins included."""
    from tests.report_site import play_site, ts
    from tests.test_report import FAULT, GENERATED, OUTAGE
    from watcher.report.produce import produce
    from watcher.report.week import week_of

    url, password = pg_record
    out = {}
    for name, store in (("sqlite", None), ("postgresql", Store(url, password=password))):
        (tmp_path / name).mkdir()
        cfg, store = play_site(tmp_path / name, ts(2026, 11, 14), 10.0, FAULT, OUTAGE, store=store)
        try:
            paths = produce(
                store,
                cfg,
                cfg.sites[0],
                week_of("2026-W47", cfg.sites[0].timezone),
                GENERATED,
                str(tmp_path / name / "out"),
                ("json", "csv", "html"),
                False,
                False,
            )
            out[name] = {p.name: p.read_bytes() for p in paths}
        finally:
            store.close()
    assert set(out["sqlite"]) == set(out["postgresql"]) and len(out["sqlite"]) >= 3
    for file_name, content in out["sqlite"].items():
        assert content == out["postgresql"][file_name], file_name


# --- the statement translation, without a server ------------------------------------------


@pytest.mark.parametrize(
    ("sqlite", "postgresql"),
    [
        ("SELECT a FROM t WHERE b = ? AND c = ?", "SELECT a FROM t WHERE b = %s AND c = %s"),
        ("SELECT a FROM t WHERE z = :zone AND s >= :since", "SELECT a FROM t WHERE z = %(zone)s AND s >= %(since)s"),
        ("SELECT '?', ':x', 'it''s ?' FROM t WHERE a = ?", "SELECT '?', ':x', 'it''s ?' FROM t WHERE a = %s"),
        ("SELECT a FROM t WHERE b LIKE 'x%' AND c = ?", "SELECT a FROM t WHERE b LIKE 'x%%' AND c = %s"),
        ("SELECT a % 2, b::text FROM t", "SELECT a %% 2, b::text FROM t"),
        ("INSERT OR IGNORE INTO t (a) VALUES (?)", "INSERT INTO t (a) VALUES (%s) ON CONFLICT DO NOTHING"),
        ("SELECT CAST(ts / ? AS INTEGER) AS k FROM t", "SELECT CAST(trunc(ts / %s) AS BIGINT) AS k FROM t"),
        ("SELECT CAST(max(ts) / 60 AS INTEGER) FROM t", "SELECT CAST(trunc(max(ts) / 60) AS BIGINT) FROM t"),
    ],
)
def test_statements_are_translated_outside_literals_only(sqlite, postgresql):
    """Placeholders become psycopg's, a literal % is doubled, quoted text and casts are left as
    they are, INSERT OR IGNORE and SQLite's truncating CAST get PostgreSQL's forms (derived:
    the two engines' documented syntax)."""
    from watcher.store.pg import statement

    assert statement(sqlite) == postgresql


def test_a_sqlite_site_never_imports_the_postgresql_driver(tmp_path):
    """Opening, writing and reading a SQLite record leaves psycopg unimported (85 ms a command
    saved on every site)."""
    code = (
        "import sys\nfrom watcher.store.db import Store\nimport watcher.cli, watcher.status, watcher.service\n"
        f"s = Store({str(tmp_path / 'w.db')!r})\n"
        "with s.atomic():\n    s.rejections.add(1.0, 't', 'r', b'p')\n"
        "s.close()\nprint('psycopg' in sys.modules)\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert out.returncode == 0 and out.stdout.strip() == "False", out.stdout + out.stderr


def test_percent_signs_and_question_marks_reach_postgresql_as_written(pg_record):
    """A % in a literal or an operator, and a ? or :name inside quotes, mean on the server what
    they mean in SQLite, with parameters and without."""
    url, password = pg_record
    store = Store(url, password=password)
    try:
        assert store.conn.execute("SELECT 'x%', 7 % 2, '?', ':a'").fetchone() == ("x%", 1, "?", ":a")
        assert store.conn.execute("SELECT 'x%', 7 % 2, '?', ?", (5,)).fetchone() == ("x%", 1, "?", 5)
        assert store.conn.execute("SELECT 'x%', :n", {"n": 2}).fetchone() == ("x%", 2)
    finally:
        store.close()


def test_replay_status_and_alerts_commands_on_postgresql(tmp_path, pg_record):
    """`watcher replay` writes a recorded file into a PostgreSQL record (a second replay finds
    only duplicates), and `status`, `alerts` and `verify` read it, from the configuration."""
    from click.testing import CliRunner

    from tests.test_replay import T0 as R0
    from tests.test_replay import write_config
    from watcher.cli import main

    url, password = pg_record
    cfg = write_config(tmp_path)
    (tmp_path / "pg-pw").write_text(password + "\n")
    (tmp_path / "pg-pw").chmod(0o600)
    cfg.write_text(
        cfg.read_text().replace("[storage]\n", f'[storage]\nurl = "{url}"\npassword_file = "{tmp_path / "pg-pw"}"\n')
    )
    rows = ["time,zone,signal,value,sensor"]
    rows += [f"{R0 + 60 * k},bulk-a,air_c,{-25.0 + (5.0 if k % 360 < 30 else 0.0)},s1" for k in range(2 * 1440)]
    (tmp_path / "r.csv").write_text("\n".join(rows) + "\n")
    first = CliRunner().invoke(main, ["replay", "--config", str(cfg), str(tmp_path / "r.csv")])
    assert first.exit_code == 0 and "accepted: 2880" in first.output, first.output
    assert url in first.output  # where it went
    again = CliRunner().invoke(main, ["replay", "--config", str(cfg), str(tmp_path / "r.csv")])
    assert "duplicate: 2880" in again.output, again.output
    status = json.loads(CliRunner().invoke(main, ["status", "--config", str(cfg), "--json"]).output)
    assert status["zones"][0]["readings_total"] == 2880 and status["zones"][0]["budget_used_pct"] > 0
    listed = CliRunner().invoke(main, ["alerts", "--config", str(cfg), "--json"])
    assert listed.exit_code == 0, listed.output
    checked = CliRunner().invoke(main, ["verify", "--config", str(cfg)])
    assert checked.exit_code == 0 and "Record intact" in checked.output, checked.output
    assert not (tmp_path / "w.db").exists()  # nothing went to the file


def test_big_reads_come_through_a_server_side_cursor_a_batch_at_a_time(pg_record, tmp_path, monkeypatch):
    """verify's walks and a zone's readings stream from PostgreSQL a batch at a time (a client
    cursor would hold a year of readings in memory): with batches of seven rows the answers
    are the same, and a server-side cursor was used."""
    from watcher.store import pg

    url, password = pg_record
    store = Store(url, password=password)
    fill(tmp_path, store, retention=False)
    whole = (chain.verify(store.conn), list(store.readings.of_zone("bulk-a")))
    opened = []
    real = pg.PgConnection.stream

    def counted(self, sql, params=()):
        opened.append(sql)
        return real(self, sql, params)

    monkeypatch.setattr(pg, "STREAM_ROWS", 7)
    monkeypatch.setattr(pg.PgConnection, "stream", counted)
    assert (chain.verify(store.conn), list(store.readings.of_zone("bulk-a"))) == whole
    assert len(whole[1]) == 601 and any("FROM reading_rows WHERE id >=" in s for s in opened)
    store.close()
