"""The record's hash chains: intact after normal work and retention, broken by any edit."""

import sqlite3
import subprocess
import sys

import pytest

from tests.test_engine import NOW, make, msg
from watcher.engine.lots import record_event
from watcher.store import chain


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
    with store.atomic():
        store.alert_log_add(1, "raise", 1.0, 2.0, 3.5)
        store.event_upsert("bulk-a", "door", 100.0, 160.0, {"source": "signal"})
        store.event_upsert("bulk-a", "door", 100.0, 170.0, {"cost": "final"})
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
        store.alert_log_add(1, "raise", 1.0, 2.0, 3.5)
        store.alert_log_add(1, "clear", 5.0, 6.0, -0.0)
        store.alert_log_add(1, "ack", 7.0, 8.0, None, "qa", "note")
    store.close()
    out = verify_cli(tmp_path / "w.db")
    assert out.returncode == 0 and "Record intact" in out.stdout, out.stdout


def test_intact_record_verifies(filled):
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


def test_altered_value_names_exactly_that_row(filled):
    with sqlite3.connect(filled) as db:
        (row_id,) = db.execute(
            "SELECT id FROM readings WHERE zone = 'bulk-a' ORDER BY id LIMIT 1 OFFSET 250"
        ).fetchone()
        db.execute("UPDATE readings SET value = -30.0 WHERE id = ?", (row_id,))
        findings, _ = chain.verify(db)
    assert [(f.chain, f.row_id) for f in findings] == [("readings/bulk-a", row_id)]


def test_retention_keeps_the_chain_verifiable(tmp_path):
    """Folding old raw readings into hourly rows deletes them; the chain still verifies."""
    cfg, store, engine = make(tmp_path, reorder=0.0)
    engine.process([msg("bulk-a", k) for k in range(0, 300)], now=NOW)
    engine.process([msg("bulk-a", 10, value=-21.0, sensor="s2")], now=NOW)  # an old reading inserted late
    with store.atomic():
        assert store.downsample("bulk-a", 1_795_000_000.0 + 60 * 120) > 0
    findings, counts = chain.verify(store.conn)
    assert findings == [] and counts["readings/bulk-a"] == 300 - 121


def test_since_starts_part_way(filled):
    with sqlite3.connect(filled) as db:
        db.execute(
            "UPDATE readings SET value = 0 WHERE zone = 'bulk-a' AND id = (SELECT min(id) FROM readings WHERE zone = 'bulk-a')"
        )
        findings, _ = chain.verify(db)
        assert findings and findings[0].chain == "readings/bulk-a"
        later, counts = chain.verify(db, since_ts=1_795_000_000.0 + 60 * 300)
    assert [f for f in later if f.chain.startswith("readings")] == []  # the edit lies before --since
    assert counts["readings/bulk-a"] < 601
