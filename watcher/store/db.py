"""SQLite storage through sqlite-utils: schema migrations, the batch writer, read-only readers.

WAL mode with synchronous=FULL on every connection, so a committed batch survives power loss
before its MQTT acknowledgement goes out. One writer connection (owned by the writer thread);
readers (status, reports) open their own read-only connections. A busy timeout lets the writer
wait out an online backup instead of failing.
"""

from __future__ import annotations

import io
import json
import os
import sqlite3
from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import sqlite_utils
from sqlite_utils.migrations import Migrations

from watcher.errors import StoreError
from watcher.store import chain
from watcher.store.alert_rows import AlertRows, EventRows
from watcher.store.lot_rows import LotRows
from watcher.store.outbox import OutboxRows

BUSY_TIMEOUT_MS = 30_000
READING_INSERT = chain.insert_sql("readings", chain.READING_FIELDS, zone_scoped=True, verb="INSERT OR IGNORE")
READING_INSERT_CHAINED = (
    f"INSERT OR IGNORE INTO readings ({', '.join(chain.READING_FIELDS)}, chain) "
    f"VALUES ({', '.join('?' * (len(chain.READING_FIELDS) + 1))})"
)
REJECTION_INSERT = chain.insert_sql("rejections", chain.REJECTION_FIELDS, zone_scoped=False)
PAYLOAD_KEEP_BYTES = 512
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
    for table, id_col in chain.CHAINED_TABLES:
        first = conn.execute(f"SELECT coalesce(max({id_col}), 0) + 1 FROM {table} WHERE chain IS NULL").fetchone()[0]
        conn.execute("INSERT INTO record_meta (key, value) VALUES (?, ?)", (f"chained_from:{table}", first))
    # Raw readings folded before passes were recorded: one pass row per zone says how many.
    for zone, n, last in conn.execute(
        "SELECT zone, sum(n), max(hour_ts) FROM readings_hourly GROUP BY zone"
    ).fetchall():
        chain.add_fold(conn, "readings", zone, [], n, last + 3600.0, None)
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


@dataclass
class ZoneRow:
    zone: str
    spec_key: str
    fed_ts: float | None
    state: dict | None
    sensors: dict
    figures: dict
    readings_total: int
    last_ts: float | None
    last_air_c: float | None
    last_product_c: float | None
    updated_ts: float


def pack_state(arrays: dict[str, np.ndarray]) -> bytes:
    buf = io.BytesIO()
    np.savez(buf, **arrays)
    return buf.getvalue()


def unpack_state(blob: bytes) -> dict[str, np.ndarray]:
    with np.load(io.BytesIO(blob)) as data:
        return {k: data[k] for k in data.files}


def _text(s: str) -> str:
    """Text SQLite can store as UTF-8: lone surrogates become backslash escapes."""
    return s.encode("utf-8", "backslashreplace").decode("utf-8")


def is_storage_fault(exc: BaseException) -> bool:
    """sqlite3's operational errors and OS errors are the storage's; integrity, interface and
    programming errors (a value that cannot be bound, a broken constraint) are the data's."""
    if isinstance(exc, StoreError):
        return True
    if isinstance(exc, (sqlite3.OperationalError, OSError)):
        return True
    return type(exc) in (sqlite3.DatabaseError, sqlite3.InternalError)


def _connect(path: str, readonly: bool) -> sqlite3.Connection:
    if readonly:
        uri = Path(path).resolve().as_uri() + "?mode=ro"
        conn = sqlite3.connect(uri, uri=True, timeout=BUSY_TIMEOUT_MS / 1000, check_same_thread=False)
    else:
        # Built by the main thread, then used only by the writer thread that owns it.
        conn = sqlite3.connect(path, timeout=BUSY_TIMEOUT_MS / 1000, isolation_level=None, check_same_thread=False)
    conn.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
    return conn


class Store(OutboxRows, AlertRows, EventRows, LotRows):
    """The writer's handle (or, with readonly=True, a reader's)."""

    def __init__(self, path: str, readonly: bool = False):
        self.path = path
        self._heads: dict[str, str | None] = {}  # readings chain heads, valid while data_version holds
        self._heads_version = None
        try:
            if not readonly:
                Path(path).parent.mkdir(parents=True, exist_ok=True)
                if not Path(path).exists():  # the record: owner only (WAL and SHM files follow its mode)
                    os.close(os.open(path, os.O_CREAT | os.O_WRONLY, 0o600))
            elif not Path(path).is_file():
                raise StoreError(f"{path}: no database here yet (has `watcher run` or `watcher replay` written one?)")
            self.conn = _connect(path, readonly)
            chain.register(self.conn)
            self.db = sqlite_utils.Database(self.conn)
            if not readonly:
                self.conn.execute("PRAGMA journal_mode = WAL")
                self.conn.execute("PRAGMA synchronous = FULL")
                migrations.apply(self.db)
        except (sqlite3.Error, OSError) as exc:
            raise StoreError(f"{path}: cannot open the database ({exc})") from exc

    def close(self) -> None:
        self.conn.close()

    # --- writing -------------------------------------------------------------------------
    @contextmanager
    def atomic(self):
        """One transaction. A storage fault inside it (disk full, locked past the busy timeout,
        I/O error, a read-only or vanished file) leaves as StoreError; other errors pass through
        unchanged: they belong to the data being written, not to the storage."""
        try:
            with self.db.atomic():
                yield
        except Exception as exc:
            if is_storage_fault(exc):
                raise StoreError(f"{self.path}: {type(exc).__name__}: {exc}") from exc
            raise

    def insert_reading(self, reading, received_ts: float, topic: str, late: bool) -> bool:
        """Insert one reading; False when its natural key is already stored (a duplicate)."""
        self._heads.pop(reading.zone, None)  # chained in SQL: the cached head moves
        values = (
            reading.zone,
            reading.sensor,
            reading.signal,
            reading.ts,
            reading.value,
            received_ts,
            topic,
            int(late),
        )
        cur = self.conn.execute(READING_INSERT, chain.params(values, reading.zone))
        return cur.rowcount == 1

    def insert_readings_all_new(self, items) -> bool:
        """Insert (reading, received_ts, topic) rows in one statement if none is stored yet;
        otherwise insert nothing and return False (the caller goes row by row).

        The chain is computed here in Python from each zone's stored head (a callback from
        SQLite per row costs more). That is safe with other writers: in WAL mode a write from a
        stale snapshot fails (SQLITE_BUSY_SNAPSHOT), the batch is retried and re-reads the heads.
        """
        self.conn.execute("SAVEPOINT bulk")
        version = self.conn.execute("PRAGMA data_version").fetchone()[0]
        if version != self._heads_version:  # another connection has committed: heads may have moved
            self._heads, self._heads_version = {}, version
        heads = {}
        for zone in {r.zone for r, _, _ in items}:
            if zone not in self._heads:
                row = self.conn.execute("SELECT chain FROM readings WHERE zone = ? ORDER BY id DESC LIMIT 1", (zone,))
                self._heads[zone] = (row.fetchone() or (None,))[0]
            heads[zone] = self._heads[zone]
        rows = []
        for r, rts, topic in items:
            values = (r.zone, r.sensor, r.signal, r.ts, r.value, rts, topic, 0)
            heads[r.zone] = chain.chain_hash(heads[r.zone], *values)
            rows.append((*values, heads[r.zone]))
        before = self.conn.total_changes
        self.conn.executemany(READING_INSERT_CHAINED, rows)
        if self.conn.total_changes - before == len(items):
            self.conn.execute("RELEASE SAVEPOINT bulk")
            self._heads.update(heads)
            return True
        self.conn.execute("ROLLBACK TO SAVEPOINT bulk")
        self.conn.execute("RELEASE SAVEPOINT bulk")
        return False

    def forget_heads(self) -> None:
        """After a failed transaction: the cached chain heads may name rows that were rolled back."""
        self._heads, self._heads_version = {}, None

    def insert_rejection(self, received_ts: float, topic: str, reason: str, payload: bytes, n: int = 1) -> None:
        """One rejected message (or n like it, when a topic's rejections are rate-limited)."""
        text = payload[:PAYLOAD_KEEP_BYTES].decode("utf-8", errors="backslashreplace")
        values = (received_ts, _text(topic[:512]), _text(reason), text, n)
        self.conn.execute(REJECTION_INSERT, chain.params(values))

    def hold(self, received_ts: float, topic: str, payload: bytes, reason: str) -> None:
        self.conn.execute(
            "INSERT INTO held (received_ts, topic, payload, reason) VALUES (?,?,?,?)",
            (received_ts, _text(topic), payload, _text(reason)),
        )

    def held_rows(self, limit: int) -> list[tuple]:
        """(id, received_ts, topic, payload, reason), oldest first."""
        return self.conn.execute(
            "SELECT id, received_ts, topic, payload, reason FROM held ORDER BY id LIMIT ?", (limit,)
        ).fetchall()

    def unhold(self, ids: list[int]) -> None:
        self.conn.executemany("DELETE FROM held WHERE id = ?", [(i,) for i in ids])

    def stored_value(self, reading) -> float | None:
        row = self.conn.execute(
            "SELECT value FROM readings WHERE zone = ? AND sensor = ? AND signal = ? AND ts = ?",
            (reading.zone, reading.sensor, reading.signal, reading.ts),
        ).fetchone()
        return None if row is None else row[0]

    def messages_handled(self) -> int:
        """Messages the service has dealt with: readings, rejected (a row may stand for n), held,
        lot events."""
        return self.conn.execute(
            "SELECT (SELECT count(*) FROM readings) + (SELECT coalesce(sum(n), 0) FROM rejections) "
            "+ (SELECT count(*) FROM held) + (SELECT count(*) FROM lot_events)"
        ).fetchone()[0]

    def sensor_names(self, zone: str) -> set[str]:
        sql = "SELECT DISTINCT sensor FROM readings WHERE zone = ? UNION SELECT DISTINCT sensor FROM readings_hourly WHERE zone = ?"
        return {r[0] for r in self.conn.execute(sql, (zone, zone))}

    def newest_reading_ts(self) -> float | None:
        """The newest reading time any checkpoint has seen (what the data say the time is)."""
        return self.conn.execute("SELECT max(last_ts) FROM zone_state").fetchone()[0]

    def insert_gap(self, zone: str, start_ts: float, end_ts: float) -> None:
        self.conn.execute(
            "INSERT OR IGNORE INTO gaps (zone, start_ts, end_ts, seconds) VALUES (?,?,?,?)",
            (zone, start_ts, end_ts, end_ts - start_ts),
        )

    def save_zone(self, row: ZoneRow) -> None:
        self.conn.execute(
            "INSERT OR REPLACE INTO zone_state (zone, spec_key, fed_ts, state, sensors, figures, readings_total, last_ts, "
            "last_air_c, last_product_c, updated_ts) VALUES (?,?,?,?,?,?,?,?,?,?,?)",
            (
                row.zone,
                row.spec_key,
                row.fed_ts,
                None if row.state is None else pack_state(row.state),
                json.dumps(row.sensors),
                json.dumps(row.figures),
                row.readings_total,
                row.last_ts,
                row.last_air_c,
                row.last_product_c,
                row.updated_ts,
            ),
        )

    def save_anchor(self, zone: str, spec_key: str, fed_ts: float | None, state: dict | None, sensors: dict) -> None:
        self.conn.execute(
            "INSERT OR REPLACE INTO zone_anchor (zone, spec_key, fed_ts, state, sensors) VALUES (?,?,?,?,?)",
            (zone, spec_key, fed_ts, None if state is None else pack_state(state), json.dumps(sensors)),
        )

    def downsample(self, zone: str, upto_ts: float, wall_s: float) -> int:
        """Fold a zone's raw readings with ts <= upto_ts into hourly aggregates; return how many."""
        self.forget_heads()
        self.conn.execute(
            "INSERT INTO readings_hourly (zone, sensor, signal, hour_ts, mean, min, max, n) "
            "SELECT zone, sensor, signal, CAST(ts / 3600 AS INTEGER) * 3600.0, avg(value), min(value), max(value), count(*) "
            "FROM readings WHERE zone = ? AND ts <= ? GROUP BY zone, sensor, signal, CAST(ts / 3600 AS INTEGER) "
            "ON CONFLICT(zone, sensor, signal, hour_ts) DO UPDATE SET "
            "mean = (mean * n + excluded.mean * excluded.n) / (n + excluded.n), min = min(min, excluded.min), "
            "max = max(max, excluded.max), n = n + excluded.n",
            (zone, upto_ts),
        )
        return self._cut("readings", zone, "ts", upto_ts, wall_s)

    def prune_rejections(self, upto_ts: float, wall_s: float) -> int:
        """Delete rejections received at or before upto_ts (with the raw readings' retention)."""
        return self._cut("rejections", "", "received_ts", upto_ts, wall_s)

    def _cut(self, table: str, zone: str, time_col: str, upto_ts: float, wall_s: float) -> int:
        """Delete a chain's rows at or before the cut-off, keeping the chain verifiable: each
        surviving row's link to a deleted predecessor, and the pass itself (cut-off, rows,
        when), go into the chained fold record (store/chain.py checks them)."""
        scope, args = ("zone = ? AND ", (zone,)) if table == "readings" else ("", ())
        n = self.conn.execute(
            f"SELECT count(*) FROM {table} WHERE {scope}{time_col} <= ?", (*args, upto_ts)
        ).fetchone()[0]
        if not n:
            return 0
        links = self.conn.execute(
            f"SELECT id, prev FROM (SELECT id, {time_col} AS t, lag(chain) OVER (ORDER BY id) AS prev, "
            f"lag({time_col}) OVER (ORDER BY id) AS prev_t FROM {table} WHERE {scope}1) WHERE t > ? AND prev_t <= ?",
            (*args, upto_ts, upto_ts),
        ).fetchall()
        chain.add_fold(self.conn, table, zone, links, n, upto_ts, wall_s)
        self.conn.execute(f"DELETE FROM {table} WHERE {scope}{time_col} <= ?", (*args, upto_ts))
        return n

    # --- reading -------------------------------------------------------------------------
    def anchor(self, zone: str) -> tuple | None:
        row = self.conn.execute(
            "SELECT spec_key, fed_ts, state, sensors FROM zone_anchor WHERE zone = ?", (zone,)
        ).fetchone()
        if row is None:
            return None
        return row[0], row[1], None if row[2] is None else unpack_state(row[2]), json.loads(row[3])

    def zone_rows(self) -> dict[str, ZoneRow]:
        out = {}
        for r in self.conn.execute(
            "SELECT zone, spec_key, fed_ts, state, sensors, figures, readings_total, last_ts, last_air_c, last_product_c, updated_ts "
            "FROM zone_state"
        ):
            out[r[0]] = ZoneRow(
                r[0],
                r[1],
                r[2],
                None if r[3] is None else unpack_state(r[3]),
                json.loads(r[4]),
                json.loads(r[5]),
                r[6],
                r[7],
                r[8],
                r[9],
                r[10],
            )
        return out

    def readings_for(self, zone: str, after_ts: float | None = None, upto_ts: float | None = None) -> Iterator[tuple]:
        """(sensor, signal, ts, value) of a zone's raw model readings in time order."""
        sql = "SELECT sensor, signal, ts, value FROM readings WHERE zone = ? AND signal IN ('air_c', 'product_c')"
        args: list = [zone]
        if after_ts is not None:
            sql += " AND ts > ?"
            args.append(after_ts)
        if upto_ts is not None:
            sql += " AND ts <= ?"
            args.append(upto_ts)
        yield from self.conn.execute(sql + " ORDER BY ts, sensor, signal", args)

    def zone_summary(self, zone: str) -> tuple[int, float | None]:
        """Readings stored for the zone (raw, plus those folded into hourly rows) and the newest time."""
        count, last = self.conn.execute("SELECT count(*), max(ts) FROM readings WHERE zone = ?", (zone,)).fetchone()
        folded = self.conn.execute(
            "SELECT coalesce(sum(n), 0) FROM readings_hourly WHERE zone = ?", (zone,)
        ).fetchone()[0]
        return count + folded, last

    def count(self, table: str) -> int:
        return self.conn.execute(f"SELECT count(*) FROM {table}").fetchone()[0]

    def gaps(self, zone: str | None = None) -> list[tuple]:
        sql = "SELECT zone, start_ts, end_ts, seconds FROM gaps"
        args: Iterable = ()
        if zone:
            sql += " WHERE zone = ?"
            args = (zone,)
        return list(self.conn.execute(sql + " ORDER BY start_ts", args))
