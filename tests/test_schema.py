"""A database written before a schema change opens with the new code: the migrations keep
what it holds readable and its record verifiable (a real SQLite file, migrated in steps)."""

import json
import sqlite3

import numpy as np
import pytest
import sqlite_utils

from watcher.errors import StoreError
from watcher.files.profiles import load_profile
from watcher.model.integrator import Position, Spec, State, new_state
from watcher.store.db import Store
from watcher.store.schema import migrations
from watcher.store.zones import pack_state, unpack_state


def test_a_database_from_before_the_instant_rename_opens_and_verifies(tmp_path):
    """Stored before instants were named `_ts` (and before the fold record): the columns, the
    alert and figure JSON keys are renamed, retention's old folds still verify, and a lot's
    figures and an alert's state read back under the new names."""
    path = str(tmp_path / "old.db")
    conn = sqlite3.connect(path, isolation_level=None)
    db = sqlite_utils.Database(conn)
    migrations.apply(db, stop_before="m008_record_seal")
    conn.execute(
        "INSERT INTO readings_hourly (zone, sensor, signal, hour_ts, mean, min, max, n) "
        "VALUES ('bulk-a', 's1', 'air_c', 3600.0, -25.0, -25.5, -24.5, 60)"
    )
    migrations.apply(db, stop_before="m010_instant_names")  # m008 records that fold under its old names
    state = {
        "status": "open",
        "since_s": 100.0,
        "raised_s": 160.0,
        "notified_s": 160.0,
        "acked_s": None,
        "clearing_since_s": None,
        "alert_id": 1,
    }
    conn.execute("INSERT INTO alert_state (zone, rule, state) VALUES ('bulk-a', 'door-open', ?)", (json.dumps(state),))
    conn.execute(
        "INSERT INTO zone_state (zone, spec_key, sensors, figures, readings_total, updated_ts) VALUES (?,?,?,?,?,?)",
        ("bulk-a", "k", "{}", json.dumps({"model_time_s": 7200.0, "budget_used_pct": 1.5}), 60, 7200.0),
    )
    conn.execute(
        "INSERT INTO lot_state (lot, t_s, state, figures, updated_s) VALUES ('L1', 7200.0, x'00', ?, 7201.0)",
        (json.dumps({"t_s": 7200.0, "budget_used_pct": 2.0}),),
    )
    conn.close()

    with pytest.raises(StoreError, match="written by an older watcher .*start the service once"):
        Store(path, readonly=True)  # a reader never migrates, and says what to do
    store = Store(path)
    try:
        assert store.alerts.states()[("bulk-a", "door-open")]["raised_ts"] == 160.0
        assert store.zones.rows()["bulk-a"].figures["model_time_ts"] == 7200.0
        time_ts, _, figures = store.lots.state_get("L1")
        assert (time_ts, figures["time_ts"]) == (7200.0, 7200.0)
        findings, counts = store.record.verify()
        assert findings == [] and counts["chain_folds"] == 1, (findings, counts)
    finally:
        store.close()


def test_readings_written_before_their_counts_were_kept_are_counted_once(tmp_path):
    """m014 counts each zone's readings already stored (and those retention folded) once; from
    then on every write adds to the count, and a full verify finds the counts and the rows agree."""
    from watcher.ingest.payload import Reading
    from watcher.store import chain

    # The per-row insert of the layout before m016 (readings a table, each row's hash in SQL).
    reading_insert = chain.insert_sql("readings", chain.READING_FIELDS, zone_scoped=True, verb="INSERT OR IGNORE")

    path = str(tmp_path / "old.db")
    conn = sqlite3.connect(path, isolation_level=None)
    chain.register(conn)
    db = sqlite_utils.Database(conn)
    migrations.apply(db, stop_before="m014_reading_counts")
    for k in range(40):
        values = ("bulk-a", "s1", "air_c", 1_795_000_000.0 + 60 * k, -25.0, 0.0, "t", 0)
        conn.execute(reading_insert, chain.params(values, "bulk-a"))
    chain.add_fold(conn, "readings", "bulk-a", [], 25, 1_795_000_000.0 - 400 * 86400, 1_795_000_000.0)
    conn.execute(
        "INSERT INTO readings_hourly (zone, sensor, signal, hour_ts, mean, min, max, n) "
        "VALUES ('bulk-a', 's1', 'air_c', 3600.0, -25.0, -25.5, -24.5, 25)"
    )
    conn.close()
    store = Store(path)
    try:
        assert dict(store.conn.execute("SELECT zone, rows FROM reading_counts")) == {"bulk-a": 65}
        with store.atomic():
            store.readings.add(Reading("bulk-a", "s2", "air_c", 1_795_100_000.0, -24.0), 0.0, "t", False)
            store.readings.add(Reading("bulk-a", "s2", "air_c", 1_795_100_000.0, -24.0), 0.0, "t", False)  # duplicate
            store.readings.add_all_new([(Reading("dispatch", "s1", "air_c", 1_795_100_000.0, -24.0), 0.0, "t")])
        assert dict(store.conn.execute("SELECT zone, rows FROM reading_counts")) == {"bulk-a": 66, "dispatch": 1}
        assert store.record.heads()["readings/bulk-a"][2] == 66
        findings, _ = store.record.verify()
        assert [f for f in findings if f.chain.startswith("readings/")] == [], findings
    finally:
        store.close()


def test_a_checkpoint_written_under_the_old_field_names_loads():
    """A model state packed when its time fields were `t_s` and `thawed_at_s` loads unchanged."""
    spec = Spec(load_profile("dairy-ice-cream"), (Position("core", 8 * 3600.0),))
    state = new_state(spec, 0.0, -25.0, -25.0)
    old = {
        ("t_s" if k == "time_ts" else "thawed_at_s" if k == "thawed_ts" else k): v for k, v in state.arrays().items()
    }
    back = State.from_arrays(unpack_state(pack_state(old)))
    assert back.time_ts == state.time_ts and np.array_equal(back.nc, state.nc)


def test_database_errors_leave_the_store_as_the_error_tree(tmp_path):
    """A read from a file that is not watcher's database is a StoreError (a storage fault),
    a row the database refuses is RecordRefused (the data's fault): never a sqlite3 error."""

    from watcher.errors import RecordRefused

    other = tmp_path / "other.db"
    sqlite3.connect(other).execute("CREATE TABLE something (x)").connection.commit()
    reader = Store(str(other), readonly=True)
    with pytest.raises(StoreError, match="no such table"):
        reader.alerts.list()
    reader.close()
    store = Store(str(tmp_path / "w.db"))
    with pytest.raises(RecordRefused, match="NOT NULL"), store.atomic():
        store.alerts.add(
            zone=None,
            rule="r",
            severity="warning",
            label="l",
            metric="air_c",
            threshold=1.0,
            status="open",
            raised_ts=1.0,
        )
    assert store.alerts.list() == []
    store.close()


def test_a_zones_events_are_read_by_their_end_not_from_the_zones_first(tmp_path):
    """The analysis asks for a zone's events ending after a time several times a pass: the
    answer is every event of that zone that ends at or after it or is still open (and starts
    before `until` when given), in start order, and the ended ones come from a range of the
    end index, so a year of events costs no more to ask than a week (derived: the query's
    plan, on a real SQLite file)."""
    store = Store(str(tmp_path / "w.db"))
    rng = np.random.default_rng(3)
    made = []
    with store.atomic():
        for k in range(400):
            zone = "z1" if k % 3 else "z2"
            start = 1.7e9 + 3600.0 * k + float(rng.integers(0, 600))
            end = None if k % 97 == 0 else start + float(rng.integers(60, 7200))
            store.events.upsert(zone, ("door", "defrost", "excursion")[k % 3], start, end, {"n": k})
            made.append((zone, start, end, k))
    for since in (0.0, 1.7e9 + 3600.0 * 200, 1.7e9 + 3600.0 * 399.5, 2e9):
        for until in (None, 1.7e9 + 3600.0 * 300):
            got = [(e["start_ts"], e["end_ts"], e["n"]) for e in store.events.of_zone("z1", since, until)]
            want = sorted(
                (s, e, n)
                for z, s, e, n in made
                if z == "z1" and (e is None or e >= since) and (until is None or s < until)
            )
            assert got == want, (since, until)
    asked: list[str] = []
    store.conn.set_trace_callback(asked.append)  # the statement as run, its values filled in
    store.events.of_zone("z1", 1.7e9)
    store.conn.set_trace_callback(None)
    plan = " ".join(r[3] for r in store.conn.execute(f"EXPLAIN QUERY PLAN {asked[-1]}"))
    assert "events_end (zone=? AND end_ts>?)" in plan, plan
    store.close()
