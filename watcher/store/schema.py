"""The database schema as numbered migrations (sqlite-utils applies the ones not yet applied,
in order). A migration is never edited once released: change the schema with a new one."""

from __future__ import annotations

import json

import sqlite_utils
from sqlite_utils.migrations import Migrations

from watcher.store import chain

migrations = Migrations("watcher")


@migrations()
def m001_core(db: sqlite_utils.Database) -> None:
    db.executescript(
        """
        CREATE TABLE readings (
            id INTEGER PRIMARY KEY,
            zone TEXT NOT NULL, sensor TEXT NOT NULL, signal TEXT NOT NULL,
            ts REAL NOT NULL, value REAL NOT NULL,
            received_ts REAL NOT NULL, topic TEXT NOT NULL,
            late INTEGER NOT NULL DEFAULT 0
        );
        CREATE UNIQUE INDEX readings_natural ON readings(zone, sensor, signal, ts);
        CREATE INDEX readings_zone_ts ON readings(zone, ts);
        CREATE TABLE rejections (
            id INTEGER PRIMARY KEY, received_ts REAL NOT NULL, topic TEXT NOT NULL,
            reason TEXT NOT NULL, payload TEXT NOT NULL
        );
        CREATE INDEX rejections_received ON rejections(received_ts);
        CREATE TABLE gaps (
            id INTEGER PRIMARY KEY, zone TEXT NOT NULL, start_ts REAL NOT NULL,
            end_ts REAL NOT NULL, seconds REAL NOT NULL
        );
        CREATE UNIQUE INDEX gaps_zone_start ON gaps(zone, start_ts);
        CREATE TABLE zone_state (
            zone TEXT PRIMARY KEY, spec_key TEXT NOT NULL, fed_ts REAL, state BLOB,
            sensors TEXT NOT NULL, figures TEXT NOT NULL, readings_total INTEGER NOT NULL,
            last_ts REAL, last_air_c REAL, last_product_c REAL, updated_ts REAL NOT NULL
        );
        CREATE TABLE events (
            id INTEGER PRIMARY KEY, zone TEXT NOT NULL, kind TEXT NOT NULL,
            start_ts REAL NOT NULL, end_ts REAL, detail TEXT NOT NULL DEFAULT '{}'
        );
        """
    )


@migrations()
def m002_retention(db: sqlite_utils.Database) -> None:
    db.executescript(
        """
        CREATE TABLE readings_hourly (
            zone TEXT NOT NULL, sensor TEXT NOT NULL, signal TEXT NOT NULL, hour_ts REAL NOT NULL,
            mean REAL NOT NULL, min REAL NOT NULL, max REAL NOT NULL, n INTEGER NOT NULL
        );
        CREATE UNIQUE INDEX readings_hourly_key ON readings_hourly(zone, sensor, signal, hour_ts);
        CREATE TABLE zone_anchor (
            zone TEXT PRIMARY KEY, spec_key TEXT NOT NULL, fed_ts REAL, state BLOB, sensors TEXT NOT NULL
        );
        """
    )


@migrations()
def m003_outbox(db: sqlite_utils.Database) -> None:
    db.executescript(
        """
        CREATE TABLE outbox (
            id INTEGER PRIMARY KEY, created_s REAL NOT NULL, tags TEXT NOT NULL, title TEXT NOT NULL,
            body TEXT NOT NULL, status TEXT NOT NULL DEFAULT 'pending', attempts INTEGER NOT NULL DEFAULT 0,
            next_try_s REAL NOT NULL, last_result TEXT, last_log TEXT, sent_s REAL
        );
        CREATE INDEX outbox_due ON outbox(status, next_try_s);
        """
    )


@migrations()
def m004_alerts(db: sqlite_utils.Database) -> None:
    db.executescript(
        """
        ALTER TABLE outbox ADD COLUMN channel TEXT;
        ALTER TABLE outbox ADD COLUMN dedupe TEXT;
        ALTER TABLE outbox ADD COLUMN alert_id INTEGER;
        ALTER TABLE outbox ADD COLUMN attach TEXT;
        ALTER TABLE outbox ADD COLUMN maybe_repeat INTEGER NOT NULL DEFAULT 0;
        ALTER TABLE outbox ADD COLUMN last_failure TEXT;
        CREATE UNIQUE INDEX outbox_dedupe ON outbox(dedupe);
        CREATE UNIQUE INDEX events_key ON events(zone, kind, start_ts);
        CREATE TABLE alerts (
            id INTEGER PRIMARY KEY, zone TEXT NOT NULL, rule TEXT NOT NULL, severity TEXT NOT NULL,
            label TEXT NOT NULL, metric TEXT NOT NULL, threshold REAL NOT NULL, status TEXT NOT NULL,
            since_s REAL, raised_s REAL NOT NULL, value REAL, worst_value REAL, acked_s REAL, acked_by TEXT,
            ack_note TEXT, cleared_s REAL, escalated_s REAL, repeats INTEGER NOT NULL DEFAULT 0
        );
        CREATE INDEX alerts_status ON alerts(status);
        CREATE TABLE alert_log (
            id INTEGER PRIMARY KEY, alert_id INTEGER NOT NULL, step TEXT NOT NULL, at_s REAL NOT NULL,
            wall_s REAL NOT NULL, value REAL, by TEXT, note TEXT
        );
        CREATE INDEX alert_log_alert ON alert_log(alert_id);
        CREATE TABLE alert_state (zone TEXT NOT NULL, rule TEXT NOT NULL, state TEXT NOT NULL, PRIMARY KEY (zone, rule));
        CREATE TABLE alert_commands (
            id INTEGER PRIMARY KEY, alert_id INTEGER NOT NULL, by TEXT NOT NULL, note TEXT, source TEXT NOT NULL,
            sender TEXT, received_s REAL NOT NULL, done_s REAL, result TEXT
        );
        CREATE TABLE zone_snapshots (
            zone TEXT NOT NULL, t_s REAL NOT NULL, spec_key TEXT NOT NULL, state BLOB NOT NULL, PRIMARY KEY (zone, t_s)
        );
        CREATE TABLE zone_marks (zone TEXT NOT NULL, mark TEXT NOT NULL, value REAL, PRIMARY KEY (zone, mark));
        CREATE TABLE daily_growth (
            zone TEXT NOT NULL, day TEXT NOT NULL, position TEXT NOT NULL, start_s REAL NOT NULL, end_s REAL NOT NULL,
            baseline_um REAL NOT NULL, defrost_um REAL NOT NULL, door_um REAL NOT NULL, excursion_um REAL NOT NULL,
            unattributed_um REAL NOT NULL, total_excess_um REAL NOT NULL, events INTEGER NOT NULL,
            PRIMARY KEY (zone, day)
        );
        """
    )


@migrations()
def m005_record_chain(db: sqlite_utils.Database) -> None:
    db.executescript(
        """
        ALTER TABLE readings ADD COLUMN chain TEXT;
        CREATE INDEX readings_zone_id ON readings(zone, id);
        ALTER TABLE alert_log ADD COLUMN chain TEXT;
        CREATE TABLE event_log (
            id INTEGER PRIMARY KEY, event_id INTEGER NOT NULL, op TEXT NOT NULL, zone TEXT NOT NULL,
            kind TEXT NOT NULL, start_ts REAL NOT NULL, end_ts REAL, detail TEXT NOT NULL, chain TEXT
        );
        CREATE TABLE chain_folds (tbl TEXT NOT NULL, zone TEXT NOT NULL, next_id INTEGER NOT NULL, prev_chain TEXT);
        CREATE TABLE reports (
            site TEXT NOT NULL, week TEXT NOT NULL, generated_s REAL NOT NULL, heads TEXT NOT NULL,
            digest TEXT NOT NULL, files TEXT NOT NULL, PRIMARY KEY (site, week, generated_s)
        );
        """
    )


@migrations()
def m006_lots(db: sqlite_utils.Database) -> None:
    db.executescript(
        """
        CREATE TABLE lots (
            lot TEXT PRIMARY KEY, product TEXT NOT NULL, initial TEXT NOT NULL, note TEXT, created_s REAL NOT NULL
        );
        CREATE TABLE lot_events (
            id INTEGER PRIMARY KEY, lot TEXT NOT NULL, kind TEXT NOT NULL, zone TEXT, ts REAL NOT NULL,
            source TEXT NOT NULL, sender TEXT, received_s REAL NOT NULL, note TEXT
        );
        CREATE INDEX lot_events_lot ON lot_events(lot, ts);
        CREATE INDEX lot_events_zone ON lot_events(zone);
        CREATE TABLE lot_state (
            lot TEXT PRIMARY KEY, t_s REAL NOT NULL, state BLOB NOT NULL, figures TEXT NOT NULL, updated_s REAL NOT NULL
        );
        """
    )


@migrations()
def m007_lot_chain(db: sqlite_utils.Database) -> None:
    db.executescript(
        """
        ALTER TABLE lot_events ADD COLUMN detail TEXT;
        ALTER TABLE lot_events ADD COLUMN chain TEXT;
        """
    )


@migrations()
def m008_record_seal(db: sqlite_utils.Database) -> None:
    """Rejections chained (with how many messages a row stands for); retention's folds chained
    and recorded per pass (cut-off, rows folded, when); where each chain's hashing began."""
    db.executescript(
        """
        ALTER TABLE rejections ADD COLUMN n INTEGER NOT NULL DEFAULT 1;
        ALTER TABLE rejections ADD COLUMN chain TEXT;
        ALTER TABLE chain_folds ADD COLUMN cutoff_ts REAL;
        ALTER TABLE chain_folds ADD COLUMN folded INTEGER NOT NULL DEFAULT 0;
        ALTER TABLE chain_folds ADD COLUMN wall_s REAL;
        ALTER TABLE chain_folds ADD COLUMN chain TEXT;
        CREATE TABLE record_meta (key TEXT PRIMARY KEY, value REAL NOT NULL);
        """
    )
    conn = db.conn
    tables = ("readings", "alert_log", "event_log", "lot_events", "rejections")  # the chains as they were then
    for table, id_col in (*((t, "id") for t in tables), ("chain_folds", "rowid")):
        first = conn.execute(f"SELECT coalesce(max({id_col}), 0) + 1 FROM {table} WHERE chain IS NULL").fetchone()[0]
        conn.execute("INSERT INTO record_meta (key, value) VALUES (?, ?)", (f"chained_from:{table}", first))
    # Raw readings folded before passes were recorded: one pass row per zone says how many.
    for zone, n, last in conn.execute(
        "SELECT zone, sum(n), max(hour_ts) FROM readings_hourly GROUP BY zone"
    ).fetchall():
        chain.add_fold(conn, "readings", zone, [], n, last + 3600.0, None, (*chain.FOLD_FIELDS[:-1], "wall_s"))
    legacy = conn.execute("SELECT coalesce(max(rowid), 0) FROM chain_folds").fetchone()[0]
    conn.execute("INSERT INTO record_meta (key, value) VALUES ('legacy_folds_until', ?)", (legacy,))


@migrations()
def m009_held(db: sqlite_utils.Database) -> None:
    """Readings whose time disagrees with the service clock, kept until the clocks agree."""
    db.executescript(
        """
        CREATE TABLE held (
            id INTEGER PRIMARY KEY, received_ts REAL NOT NULL, topic TEXT NOT NULL, payload BLOB NOT NULL,
            reason TEXT NOT NULL
        );
        """
    )


# Instants are `_ts`, durations `_s` (DEVELOPERS.md, Conventions): the columns and stored JSON
# keys that held an instant under an `_s` name, renamed once. Values and hashes are unchanged.
INSTANT_RENAMES = {
    "outbox": {"created_s": "created_ts", "next_try_s": "next_try_ts", "sent_s": "sent_ts"},
    "alerts": {
        "since_s": "since_ts",
        "raised_s": "raised_ts",
        "acked_s": "acked_ts",
        "cleared_s": "cleared_ts",
        "escalated_s": "escalated_ts",
    },
    "alert_log": {"at_s": "at_ts", "wall_s": "wall_ts"},
    "alert_commands": {"received_s": "received_ts", "done_s": "done_ts"},
    "zone_snapshots": {"t_s": "time_ts"},
    "daily_growth": {"start_s": "start_ts", "end_s": "end_ts"},
    "reports": {"generated_s": "generated_ts"},
    "lots": {"created_s": "created_ts"},
    "lot_events": {"received_s": "received_ts"},
    "lot_state": {"t_s": "time_ts", "updated_s": "updated_ts"},
    "chain_folds": {"wall_s": "wall_ts"},
}
JSON_KEY_RENAMES = {
    "since_s": "since_ts",
    "raised_s": "raised_ts",
    "notified_s": "notified_ts",
    "acked_s": "acked_ts",
    "clearing_since_s": "clearing_since_ts",
    "model_time_s": "model_time_ts",
    "t_s": "time_ts",
}


def _renamed_keys(value):
    if isinstance(value, dict):
        return {JSON_KEY_RENAMES.get(k, k): _renamed_keys(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_renamed_keys(v) for v in value]
    return value


@migrations()
def m010_instant_names(db: sqlite_utils.Database) -> None:
    """One naming rule for time: instants end in `_ts`, durations in `_s`."""
    conn = db.conn
    for table, renames in INSTANT_RENAMES.items():
        for old, new in renames.items():
            conn.execute(f"ALTER TABLE {table} RENAME COLUMN {old} TO {new}")
    for table, key, column in (
        ("alert_state", "zone, rule", "state"),
        ("zone_state", "zone", "figures"),
        ("lot_state", "lot", "figures"),
    ):
        cols = key.split(", ")
        for row in conn.execute(f"SELECT {key}, {column} FROM {table}").fetchall():
            text = json.dumps(_renamed_keys(json.loads(row[-1])))
            where = " AND ".join(f"{c} = ?" for c in cols)
            conn.execute(f"UPDATE {table} SET {column} = ? WHERE {where}", (text, *row[:-1]))


@migrations()
def m011_outbox_level(db: sqlite_utils.Database) -> None:
    """How urgent each message is (info, success, warning, failure): channels that show it
    (webhook `type`, chat colours) no longer say `info` for a warning."""
    db.execute("ALTER TABLE outbox ADD COLUMN level TEXT NOT NULL DEFAULT 'info'")


@migrations()
def m012_sparkplug_aliases(db: sqlite_utils.Database) -> None:
    """Which Sparkplug alias stands for which metric name, as each edge node's and device's last
    birth said: kept so that alias-only data are read after a restart."""
    db.execute(
        "CREATE TABLE sparkplug_aliases (source TEXT NOT NULL, alias INTEGER NOT NULL, name TEXT NOT NULL, "
        "PRIMARY KEY (source, alias))"
    )


@migrations()
def m013_late_index(db: sqlite_utils.Database) -> None:
    """Late readings indexed on their own (a few rows: a partial index), so the weekly summary
    counts each sensor's late readings without reading the week's rows from the table."""
    db.execute("CREATE INDEX readings_late ON readings(zone, sensor, signal, ts) WHERE late = 1")


@migrations()
def m014_reading_counts(db: sqlite_utils.Database) -> None:
    """Each zone's readings ever stored (kept or folded by retention), counted as they are
    written: chain lengths for the weekly summary and the status without counting a year of
    rows. A full `verify` still counts them and says when the two disagree."""
    conn = db.conn
    conn.execute("CREATE TABLE reading_counts (zone TEXT PRIMARY KEY, rows INTEGER NOT NULL)")
    conn.execute("INSERT INTO reading_counts (zone, rows) SELECT zone, count(*) FROM readings GROUP BY zone")
    for zone, folded in conn.execute(
        "SELECT zone, sum(folded) FROM chain_folds WHERE tbl = 'readings' AND next_id = 0 GROUP BY zone"
    ).fetchall():
        conn.execute(
            "INSERT INTO reading_counts (zone, rows) VALUES (?, ?) ON CONFLICT(zone) DO UPDATE SET rows = rows + ?",
            (zone, folded, folded),
        )


@migrations()
def m015_verify_marks(db: sqlite_utils.Database) -> None:
    """Verification marks: what each intact `verify` proved (every chain's position and hash),
    itself a chain, so `verify --since` and the daily check hash only what came after."""
    conn = db.conn
    conn.execute(
        "CREATE TABLE verify_marks (id INTEGER PRIMARY KEY, wall_ts REAL NOT NULL, since_ts REAL, "
        "heads TEXT NOT NULL, chain TEXT)"
    )
    conn.execute("INSERT INTO record_meta (key, value) VALUES ('chained_from:verify_marks', 0)")


#: A reading's hash is kept on every this many rows of a zone, on the last row of each zone a
#: batch writes, and on every row a summary or a verification mark names (store/walk.py).
KEEP_EVERY = 16

COMPACT = (
    "CREATE TABLE series (id INTEGER PRIMARY KEY, zone TEXT NOT NULL, sensor TEXT NOT NULL, signal TEXT NOT NULL, "
    "UNIQUE (zone, sensor, signal))",
    "CREATE TABLE topics (id INTEGER PRIMARY KEY, topic TEXT NOT NULL UNIQUE)",
    "CREATE TABLE reading_rows (id INTEGER PRIMARY KEY, series INTEGER NOT NULL, ts REAL NOT NULL, "
    "value REAL NOT NULL, received_ts REAL NOT NULL, topic INTEGER NOT NULL, late INTEGER NOT NULL DEFAULT 0, "
    "chain TEXT)",
)
COMPACT_INDEXES = (
    "CREATE UNIQUE INDEX reading_rows_key ON reading_rows (series, ts)",
    "CREATE INDEX reading_rows_late ON reading_rows (series, ts) WHERE late = 1",
    "CREATE INDEX reading_rows_kept ON reading_rows (series, id) WHERE chain IS NOT NULL",
    "CREATE VIEW readings (id, zone, sensor, signal, ts, value, received_ts, topic, late, chain) AS "
    # The topic as a scalar subquery: read only by the queries that ask for it.
    "SELECT r.id, s.zone, s.sensor, s.signal, r.ts, r.value, r.received_ts, "
    "(SELECT topic FROM topics WHERE id = r.topic), r.late, r.chain FROM reading_rows r JOIN series s ON s.id = r.series",
    # For a person (or a test) editing the record by hand: the view's rows edit the table's.
    "CREATE TRIGGER readings_update INSTEAD OF UPDATE ON readings BEGIN "
    "UPDATE reading_rows SET ts = NEW.ts, value = NEW.value, received_ts = NEW.received_ts, late = NEW.late, "
    "chain = NEW.chain WHERE id = OLD.id; END",
    "CREATE TRIGGER readings_delete INSTEAD OF DELETE ON readings BEGIN DELETE FROM reading_rows WHERE id = OLD.id; END",
)


@migrations()
def m016_compact_readings(db: sqlite_utils.Database) -> None:
    """Readings in the compact layout: zone, sensor and signal (a series) and the topic
    interned, a reading as numbers, one unique index (series, ts), and the hash kept on every
    KEEP_EVERY-th row of a zone, on each zone's newest row and on every row a stored summary or
    verification mark names. The chain itself does not change: the rows between two kept
    hashes are hashed as before and checked at the next one (store/walk.py). `readings` stays
    as a view with the old columns for every reader."""
    conn = db.conn
    for sql in COMPACT:
        conn.execute(sql)
    conn.execute("INSERT INTO series (zone, sensor, signal) SELECT DISTINCT zone, sensor, signal FROM readings")
    conn.execute("INSERT INTO topics (topic) SELECT DISTINCT topic FROM readings")
    pinned = {row_id for (row_id,) in conn.execute("SELECT max(id) FROM readings GROUP BY zone")}
    for (heads,) in conn.execute("SELECT heads FROM reports UNION ALL SELECT heads FROM verify_marks").fetchall():
        pinned |= {v[0] for k, v in json.loads(heads).items() if k.startswith("readings/")}
    conn.execute("CREATE TEMP TABLE pinned (id INTEGER PRIMARY KEY)")
    conn.executemany("INSERT INTO temp.pinned VALUES (?)", [(i,) for i in sorted(pinned)])
    conn.execute(
        "INSERT INTO reading_rows SELECT id, series, ts, value, received_ts, topic, late, "
        f"CASE WHEN n % {KEEP_EVERY} = 0 OR id IN (SELECT id FROM temp.pinned) THEN chain END FROM ("
        "SELECT r.id, s.id AS series, r.ts, r.value, r.received_ts, t.id AS topic, r.late, r.chain, "
        "row_number() OVER (PARTITION BY r.zone ORDER BY r.id) AS n FROM readings r "
        "JOIN series s ON s.zone = r.zone AND s.sensor = r.sensor AND s.signal = r.signal "
        "JOIN topics t ON t.topic = r.topic) ORDER BY id"
    )
    conn.execute("DROP TABLE temp.pinned")
    conn.execute("DROP TABLE readings")
    for sql in COMPACT_INDEXES:
        conn.execute(sql)


@migrations(transactional=False)
def m017_give_back_space(db: sqlite_utils.Database) -> None:
    """After m016 the old readings table's pages are free inside the file (three quarters of a
    big record): give them back to the disk once (VACUUM writes the live quarter anew; it needs
    that much free disk for a moment). A file with little free space is left as it is."""
    conn = db.conn
    free = conn.execute("PRAGMA freelist_count").fetchone()[0]
    total = conn.execute("PRAGMA page_count").fetchone()[0]
    if total and free > total // 4:
        conn.execute("VACUUM")


@migrations()
def m018_event_ends(db: sqlite_utils.Database) -> None:
    """Events indexed by their end, so a pass that asks for the events ending after a time reads
    those, not every event the zone ever had (the live analysis asks several times a pass)."""
    db.execute("CREATE INDEX events_end ON events(zone, end_ts)")
