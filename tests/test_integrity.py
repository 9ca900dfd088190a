"""The record's hash chains: intact after normal work and retention, broken by any edit."""

import json
import sqlite3
import subprocess
import sys

import pytest

from tests.test_engine import NOW, T0, make, msg
from watcher.engine.batch import Message
from watcher.engine.lots import record_event
from watcher.store import chain, walk
from watcher.store.hashing import ReadingHasher
from watcher.store.schema import KEEP_EVERY


def an_alert(store, **fields) -> int:
    """An alerts row that agrees with the log rows a test writes for it (verify cross-checks them)."""
    row = dict(zone="bulk-a", rule="air-warm", severity="warning", label="Air warm", metric="air_c", threshold=-18.0)
    return store.alerts.add(**row, **{"status": "open", "raised_ts": 1.0, **fields})


def verify_cli(db) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "watcher", "verify", "--db", str(db)], capture_output=True, text=True, timeout=60
    )


@pytest.fixture()
def filled(tmp_path):
    cfg, store, engine = make(tmp_path, reorder=0.0)
    for k0 in range(0, 600, 60):
        engine.process([msg(z, k) for k in range(k0, k0 + 60) for z in ("bulk-a", "dispatch")], now=NOW)
    engine.process([msg("bulk-a", 5, value=-20.0, sensor="s2")], now=NOW)  # a late reading (row by row)
    engine.process([Message("kp/bulk-a/s1/air", b'{"t": "warm"}', NOW, 1, 1)], now=NOW)  # a rejection
    with store.atomic():
        an_alert(store)
        store.alerts.log_add(1, "raise", 1.0, 2.0, 3.5)
        store.events.upsert("bulk-a", "door", 100.0, 160.0, {"source": "signal"})
        store.events.upsert("bulk-a", "door", 100.0, 170.0, {"cost": "final"})
        for doc in (
            {"event": "arrive", "lot": "L-1", "zone": "bulk-a", "time": NOW - 3600, "initial": {"budget_used_pct": 30}},
            {"event": "move", "lot": "L-1", "zone": "dispatch", "time": NOW - 1800},
        ):
            record_event(store, cfg, doc, "test", "cli", "qa", NOW)
    store.close()
    return tmp_path / "w.db"


def test_negative_zero_is_hashed_as_sqlite_stores_it(tmp_path):
    """An alert log value of -0.0 (a cleared cost that rounded to minus zero) still verifies:
    SQLite stores it as 0.0, and the chain hashes what is stored (this broke the demo's record)."""
    _, store, _ = make(tmp_path, reorder=0.0)
    with store.atomic():
        an_alert(store, status="cleared", cleared_ts=5.0, acked_ts=7.0, acked_by="qa")
        store.alerts.log_add(1, "raise", 1.0, 2.0, 3.5)
        store.alerts.log_add(1, "clear", 5.0, 6.0, -0.0)
        store.alerts.log_add(1, "ack", 7.0, 8.0, None, "qa", "note")
    store.close()
    out = verify_cli(tmp_path / "w.db")
    assert out.returncode == 0 and "Record intact" in out.stdout, out.stdout


def test_intact_record_verifies(filled):
    """A record written by normal work verifies intact, with the rows checked per chain."""
    out = verify_cli(filled)
    assert out.returncode == 0, out.stdout + out.stderr
    assert "readings/bulk-a" in out.stdout and "601 rows checked" in out.stdout  # 600 + the late one
    assert "Record intact" in out.stdout


@pytest.mark.parametrize(
    ("edit", "chain_name"),
    [
        (
            "UPDATE readings SET value = value + 0.5 WHERE zone = 'dispatch' AND id = (SELECT min(id) + 40 FROM readings WHERE zone = 'dispatch')",
            "readings/dispatch",
        ),
        (
            "DELETE FROM readings WHERE id = (SELECT min(id) + 100 FROM readings WHERE zone = 'bulk-a')",
            "readings/bulk-a",
        ),
        ("UPDATE alert_log SET by = 'someone else'", "alert_log"),
        ("UPDATE event_log SET end_ts = 999 WHERE id = 1", "event_log"),
        ("UPDATE lot_events SET zone = 'bulk-a' WHERE kind = 'move'", "lot_events"),
        ('UPDATE lots SET initial = \'{"kind": "fresh"}\'', "lots"),  # the declared state, quietly reset
    ],
    ids=["reading-value", "reading-deleted", "alert-log-by", "event-end", "lot-move-zone", "lot-start-state"],
)
def test_an_altered_row_is_named(filled, edit, chain_name):
    """Changing a value, deleting a row, or rewriting a log entry: verify exits 1 and names the
    chain and the first row that no longer matches."""
    with sqlite3.connect(filled) as db:
        db.execute(edit)
    out = verify_cli(filled)
    assert out.returncode == 1
    line = next(x for x in out.stdout.splitlines() if x.startswith("MISMATCH"))
    assert line.startswith(f"MISMATCH {chain_name} row ")


def covers(finding, chain_name: str, row_id: int, db) -> bool:
    """The finding names the chain and a span of rows that holds row_id: the rows from the
    last kept hash that held to the next one (at most KEEP_EVERY of the zone's rows)."""
    zone = chain_name.split("/")[1]
    (span,) = db.execute(
        "SELECT count(*) FROM readings WHERE zone = ? AND id BETWEEN ? AND ?", (zone, finding.row_id, finding.last_id)
    ).fetchone()
    return finding.chain == chain_name and finding.row_id <= row_id <= finding.last_id and span <= KEEP_EVERY


def test_altered_value_names_the_rows_around_it(filled):
    """Altering one reading's value names that zone's chain and the few rows between the kept
    hashes around it (schema m016 keeps a hash on some rows only), and nothing else."""
    with sqlite3.connect(filled) as db:
        (row_id,) = db.execute(
            "SELECT id FROM readings WHERE zone = 'bulk-a' ORDER BY id LIMIT 1 OFFSET 250"
        ).fetchone()
        db.execute("UPDATE readings SET value = -30.0 WHERE id = ?", (row_id,))
        findings, _ = chain.verify(db)
        assert len(findings) == 1 and covers(findings[0], "readings/bulk-a", row_id, db), findings


@pytest.mark.parametrize(
    "change",
    ["late = 4", "late = 'x'", "late = 1", "topic = 1073741824 + topic", "topic = -1"],
    ids=["flag-4", "flag-text", "flag-set", "topic-id-large", "topic-id-negative"],
)
def test_a_rows_flag_or_topic_id_altered_past_what_packs_is_found(filled, change):
    """The walk reads a row's series, topic and flag as one packed number; a row whose flag or
    topic id was altered to a value that number cannot hold (a flag of 4 would wrap to 0) is
    read as stored, and the alteration is named."""
    with sqlite3.connect(filled) as db:
        (row_id,) = db.execute(
            "SELECT id FROM readings WHERE zone = 'bulk-a' ORDER BY id LIMIT 1 OFFSET 300"
        ).fetchone()
        db.execute("PRAGMA foreign_keys = OFF")
        db.execute(f"UPDATE reading_rows SET {change} WHERE id = ?", (row_id,))
    with sqlite3.connect(filled) as db:
        if "topic" in change:  # the id names no topic: the row's names cannot be read at all
            db.execute(
                "INSERT INTO topics (id, topic) SELECT topic, 'made up' FROM reading_rows WHERE id = ?", (row_id,)
            )
        findings, _ = chain.verify(db)
        assert len(findings) == 1 and covers(findings[0], "readings/bulk-a", row_id, db), findings


def test_worker_processes_find_what_one_process_finds(filled, monkeypatch):
    """The chains walked in worker processes (as on a big record) give the same findings and
    counts as one process: an intact record, then one altered and one deleted reading."""
    path = str(filled)
    with sqlite3.connect(path) as db:
        serial = chain.verify(db)
    monkeypatch.setattr(walk, "PARALLEL_ROWS", 0)
    with sqlite3.connect(path) as db:
        assert chain.verify(db) == serial and serial[0] == []
        db.execute(
            "UPDATE readings SET value = -30.0 WHERE zone = 'dispatch' AND id = (SELECT id FROM readings WHERE zone = 'dispatch' ORDER BY id LIMIT 1 OFFSET 7)"
        )
        db.execute(
            "DELETE FROM readings WHERE id = (SELECT id FROM readings WHERE zone = 'bulk-a' ORDER BY id LIMIT 1 OFFSET 9)"
        )
    with sqlite3.connect(path) as db:
        parallel = chain.verify(db)
    monkeypatch.setattr(walk, "PARALLEL_ROWS", 10**12)
    with sqlite3.connect(path) as db:
        assert chain.verify(db) == parallel
    assert {f.chain for f in parallel[0] if f.kind == "MISMATCH"} == {"readings/dispatch", "readings/bulk-a"}


@pytest.mark.parametrize("offset", [-1, 0])
def test_a_break_at_the_edge_of_a_workers_range_is_found(filled, monkeypatch, offset):
    """The walk cut into row ranges (one a worker): a reading altered as the last row of the
    first range, or the first of the second, is named as one process names it."""
    path = str(filled)
    with sqlite3.connect(path) as db:
        first, last = db.execute("SELECT min(id), max(id) FROM readings").fetchone()
        edge = first + (last + 1 - first) // 2 + 1 + offset  # walk_readings' cut with two workers
        (zone,) = db.execute("SELECT zone FROM readings WHERE id = ?", (edge,)).fetchone()
        db.execute("UPDATE readings SET value = value + 1 WHERE id = ?", (edge,))
        serial = chain.verify(db)
    monkeypatch.setattr(walk, "PARALLEL_ROWS", 0)
    monkeypatch.setattr(walk.os, "cpu_count", lambda: 2)
    with sqlite3.connect(path) as db:
        assert chain.verify(db) == serial
        assert len(serial[0]) == 1 and covers(serial[0][0], f"readings/{zone}", edge, db), serial


def test_numpy_floats_are_hashed_as_sqlite_gives_them_back(tmp_path):
    """A value written as numpy's float64 (repr "np.float64(...)") is stored as a plain REAL:
    the chain hashes that, so a reading or log row written with one still verifies."""
    import numpy as np

    from watcher.ingest.payload import Reading

    assert chain.chain_hash(None, np.float64(-25.12), 1) == chain.chain_hash(None, -25.12, 1)
    _, store, _ = make(tmp_path, reorder=0.0)
    with store.atomic():
        store.readings.add_all_new(
            [(Reading("bulk-a", "s1", "air_c", np.float64(1.7e9), np.float64(-25.12)), 0.0, "t")]
        )
        store.readings.add(
            Reading("bulk-a", "s1", "air_c", np.float64(1.7e9 + 60), np.float64(-25.13)), 0.0, "t", False
        )
        an_alert(store)
        store.alerts.log_add(1, "raise", 1.0, 2.0, np.float64(3.5))
    findings, counts = chain.verify(store.conn)
    store.close()
    assert findings == [] and counts["readings/bulk-a"] == 2


def test_reading_hash_is_chain_hash():
    """The verify loop's hash of a readings row (its constant text kept from row to row) is
    exactly the general chain hash, for stored types and for odd ones (the general way)."""
    hasher = ReadingHasher()
    for values in (
        ("z", "s1", "air_c", 1.5e9, -25.25, 1.5e9 + 0.125, "kp/z/s1/air", 0),
        ("z", "s1", "air_c", 1.5e9, -0.0, 1.5e9, "t", 1),
        ("z", "s1", "air_c", 1500000000, -25, 1.5e9, "t", 0),
    ):
        for prev in (None, "ab" * 32):
            assert hasher(prev, *values) == chain.chain_hash(prev, *values)


def test_retention_keeps_the_chain_verifiable(tmp_path):
    """Folding old raw readings into hourly rows deletes them; the chain still verifies."""
    cfg, store, engine = make(tmp_path, reorder=0.0)
    engine.process([msg("bulk-a", k) for k in range(0, 300)], now=NOW)
    engine.process([msg("bulk-a", 10, value=-21.0, sensor="s2")], now=NOW)  # an old reading inserted late
    with store.atomic():
        assert store.readings.fold("bulk-a", 1_795_000_000.0 + 60 * 120, NOW + 400 * 86400) > 0
    findings, counts = chain.verify(store.conn, now_ts=NOW + 400 * 86400)
    assert findings == [] and counts["readings/bulk-a"] == 300 - 121


def test_since_starts_part_way(filled):
    """--since starts each chain at that date: an edit before it is not reported."""
    with sqlite3.connect(filled) as db:
        db.execute(
            "UPDATE readings SET value = 0 WHERE zone = 'bulk-a' AND id = (SELECT min(id) FROM readings WHERE zone = 'bulk-a')"
        )
        findings, _ = chain.verify(db)
        assert findings and findings[0].chain == "readings/bulk-a"
        later, counts = chain.verify(db, since_ts=1_795_000_000.0 + 60 * 300)
    assert [f for f in later if f.chain.startswith("readings")] == []  # the edit lies before --since
    assert counts["readings/bulk-a"] < 601


def _hole_with_handmade_fold(db, hashed: bool) -> None:
    """Erase bulk-a's warm readings (its defrost peaks after the first) and cover each hole with
    a fold row, as an insider would: copying the hash of the row before the hole, with or
    without hashing the fold into the fold chain (dated now: the pass must look recent)."""
    rows = db.execute("SELECT id, value, chain FROM readings WHERE zone = 'bulk-a' ORDER BY id").fetchall()
    before, hole = None, []
    for i, (row_id, value, _) in enumerate(rows):
        if value > -25.0 and i > 0 and (hole or rows[i - 1][1] <= -25.0):
            before = before if hole else rows[i - 1][2]
            hole.append(row_id)
        elif hole:
            db.execute(f"DELETE FROM readings WHERE id IN ({','.join(map(str, hole))})")
            if hashed:
                chain.add_fold(db, "readings", "bulk-a", [(row_id, before)], 0, T0, T0 + 86400)
            else:
                db.execute(
                    "INSERT INTO chain_folds (tbl, zone, next_id, prev_chain) VALUES ('readings', 'bulk-a', ?, ?)",
                    (row_id, before),
                )
            hole = []


def _report_then_truncate(db) -> None:
    chain.register(db)
    heads = chain.heads(db)
    db.execute(
        "INSERT INTO reports (site, week, generated_ts, heads, digest, files) VALUES ('kp', '2026-W47', ?, ?, ?, '[]')",
        (NOW, json.dumps(heads), chain.digest(heads)),
    )
    db.execute(
        "DELETE FROM readings WHERE id IN (SELECT id FROM readings WHERE zone = 'dispatch' ORDER BY id DESC LIMIT 7)"
    )
    db.execute("UPDATE zone_state SET readings_total = readings_total - 7 WHERE zone = 'dispatch'")  # cover that too


@pytest.mark.parametrize(
    ("edit", "first_line", "words"),
    [
        (lambda db: _hole_with_handmade_fold(db, hashed=False), "MISMATCH chain_folds", "not made by retention"),
        (
            lambda db: _hole_with_handmade_fold(db, hashed=True),
            "MISSING chain_folds",
            "retention keeps at least 366 days",
        ),
        (
            _report_then_truncate,
            "MISSING readings/dispatch row",
            "printed as the head in the kp summary for 2026-W47, is gone",
        ),
        (
            lambda db: db.execute(
                "DELETE FROM readings WHERE id IN (SELECT id FROM readings WHERE zone = 'bulk-a' ORDER BY id DESC LIMIT 5)"
            ),
            "MISSING readings/bulk-a",
            "5 readings missing: the checkpoint of",
        ),
        (
            lambda db: db.execute("DELETE FROM readings WHERE zone = 'dispatch'"),
            "MISSING readings/dispatch",
            "no readings left",
        ),
        (
            lambda db: db.execute(
                "UPDATE readings SET value = -40, chain = NULL WHERE zone = 'bulk-a' AND id >= (SELECT min(id) + 300 FROM readings WHERE zone = 'bulk-a')"
            ),
            "MISSING readings/bulk-a row",
            "no hash from this row on",
        ),
        (
            lambda db: db.execute("DELETE FROM alert_log WHERE id = (SELECT max(id) FROM alert_log)"),
            "MISSING alerts row 1",
            "no raise step",
        ),
        (
            lambda db: db.execute("UPDATE alerts SET status = 'cleared', cleared_ts = 9"),
            "MISSING alerts row 1",
            "cleared without",
        ),
        (lambda db: db.execute("DELETE FROM alerts"), "MISSING alerts row 1", "gone from the alerts table"),
        (lambda db: db.execute("UPDATE rejections SET reason = 'fine'"), "MISMATCH rejections row", "does not follow"),
        (lambda db: db.execute("DELETE FROM record_meta"), "MISSING readings", "where its hashing began"),
        (
            lambda db: db.execute("UPDATE reading_counts SET rows = rows + 3 WHERE zone = 'dispatch'"),
            "MISSING readings/dispatch",
            "counted as they were written",
        ),
    ],
    ids=[
        "hole-covered-by-unhashed-fold",
        "hole-covered-by-hashed-fold",
        "truncated-before-printed-head",
        "truncated-end",
        "zone-deleted",
        "chain-set-null",
        "newest-alert-log-row-deleted",
        "alert-quietly-cleared",
        "alerts-table-emptied",
        "rejection-altered",
        "hashing-start-erased",
        "written-count-differs",
    ],
)
def test_what_is_missing_is_named(filled, edit, first_line, words):
    """Each way an insider with write access can hide or rewrite part of the record without
    recomputing every hash: verify exits 1 and names the chain and what is missing."""
    with sqlite3.connect(filled) as db:
        edit(db)
    out = verify_cli(filled)
    assert out.returncode == 1, out.stdout
    lines = [x for x in out.stdout.splitlines() if x.startswith(("MISMATCH", "MISSING"))]
    assert any(x.startswith(first_line) and words in x for x in lines), out.stdout
