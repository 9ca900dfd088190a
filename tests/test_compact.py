"""The compact readings layout (schema m016): names interned, the hash kept on some rows, an
older record converted in place with its chains still verifying (real SQLite files)."""

import json
import sqlite3

import sqlite_utils

from tests.test_engine import NOW, make, msg
from watcher.ingest.payload import Reading
from watcher.store import chain
from watcher.store.db import Store
from watcher.store.schema import KEEP_EVERY, migrations

T = 1_795_000_000.0


def test_kept_hashes_fall_on_every_16th_row_and_each_batchs_last(tmp_path):
    """A batch of 40 readings of one zone keeps the hash of its 16th, 32nd and 40th rows; the
    zone's newest row always keeps one, and every other row is still hashed (verify)."""
    _, store, _ = make(tmp_path, reorder=0.0)
    with store.atomic():
        assert store.readings.add_all_new(
            [(Reading("bulk-a", "s1", "air_c", T + 60 * k, -25.0), T, "kp/bulk-a/s1/air") for k in range(40)]
        )
    kept = [n for n, (c,) in enumerate(store.conn.execute("SELECT chain FROM readings ORDER BY id"), 1) if c]
    findings, counts = chain.verify(store.conn)
    store.close()
    assert kept == [KEEP_EVERY, 2 * KEEP_EVERY, 40]
    assert findings == [] and counts["readings/bulk-a"] == 40


def test_a_batch_that_falls_back_to_row_by_row_keeps_its_new_sensor(tmp_path):
    """A batch bringing a new sensor and one reading already stored is undone and written row by
    row: the new sensor's readings are all there through the readings view, and verify."""
    _, store, engine = make(tmp_path, reorder=600.0)
    engine.process([msg("bulk-a", k) for k in range(10)], now=NOW)
    # The repeated reading lies in the reorder window (not late): the batch is tried whole first.
    engine.process([msg("bulk-a", 9)] + [msg("bulk-a", k, sensor="s9") for k in range(10, 20)], now=NOW)
    rows = store.conn.execute("SELECT count(*) FROM readings WHERE sensor = 's9'").fetchone()[0]
    stored = store.conn.execute("SELECT count(*) FROM reading_rows").fetchone()[0]
    findings, _ = chain.verify(store.conn)
    store.close()
    assert rows == 10 and stored == 20 and findings == []


def test_an_older_record_is_converted_in_place_and_still_verifies(tmp_path):
    """A record in the layout before m016 (every row's hash kept, a summary pinning a row in the
    middle of a chain) is converted on opening: the same chains verify, the summary's printed
    head still checks, and a reading altered afterwards is named."""
    path = str(tmp_path / "old.db")
    conn = sqlite3.connect(path, isolation_level=None)
    chain.register(conn)
    migrations.apply(sqlite_utils.Database(conn), stop_before="m016_compact_readings")
    insert = chain.insert_sql("readings", chain.READING_FIELDS, zone_scoped=True)
    for k in range(100):
        for zone in ("bulk-a", "dispatch"):
            values = (zone, f"s{k % 3}", "air_c", T + 60 * k, -25.0 + 0.01 * k, T + 60 * k + 1, f"kp/{zone}/x", 0)
            conn.execute(insert, chain.params(values, zone))
            conn.execute(  # as that layout's writer counted them (m014)
                "INSERT INTO reading_counts (zone, rows) VALUES (?, 1) ON CONFLICT(zone) DO UPDATE SET rows = rows + 1",
                (zone,),
            )
    (row_id, value) = conn.execute(
        "SELECT id, chain FROM readings WHERE zone = 'bulk-a' ORDER BY id LIMIT 1 OFFSET 36"
    ).fetchone()
    heads = {"readings/bulk-a": [row_id, value, 37]}
    conn.execute(
        "INSERT INTO reports (site, week, generated_ts, heads, digest, files) VALUES ('kp', '2026-W01', ?, ?, '', '[]')",
        (T, json.dumps(heads)),
    )
    conn.close()
    store = Store(path)
    try:
        kept = store.conn.execute("SELECT count(*) FROM reading_rows WHERE chain IS NOT NULL").fetchone()[0]
        assert store.conn.execute("SELECT count(*) FROM reading_rows").fetchone()[0] == 200
        assert store.conn.execute("SELECT chain FROM readings WHERE id = ?", (row_id,)).fetchone()[0] == value
        assert kept == 2 * (100 // KEEP_EVERY + 1) + 1  # each zone's 16th rows and newest, and the pinned row
        findings, counts = store.record.verify()
        assert findings == [] and counts["readings/bulk-a"] == 100, findings
        store.conn.execute("UPDATE readings SET value = 0 WHERE id = ?", (row_id + 10,))
        findings, _ = store.record.verify()
        broken = [f for f in findings if f.chain == "readings/bulk-a"]
        assert len(broken) == 1 and broken[0].row_id <= row_id + 10 <= broken[0].last_id, findings
    finally:
        store.close()
