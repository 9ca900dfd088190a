"""Readings (chained per zone), the messages rejected or held instead of them, and retention's
fold of old raw readings into hourly rows."""

from __future__ import annotations

import math
from collections.abc import Iterator

import numpy as np

from watcher.store import chain, partitions, walk
from watcher.store.bincache import BinArrays, BinWindow, as_arrays
from watcher.store.hashing import ReadingHasher
from watcher.store.repo import Repo, claim_zone, data_version, is_pg, marks, stream, text
from watcher.store.schema import KEEP_EVERY

ROW_INSERT = "INSERT OR IGNORE INTO reading_rows (series, ts, value, received_ts, topic, late, chain) VALUES (?, ?, ?, ?, ?, ?, ?)"
#: The zone's newest reading time: an index seek for each of its series (max() over the view
#: would read every row of the zone).
NEWEST = "SELECT max((SELECT max(ts) FROM reading_rows WHERE series = s.id)) FROM series s WHERE s.zone = ?"
COUNT_ADD = "INSERT INTO reading_counts (zone, rows) VALUES (?, ?) ON CONFLICT(zone) DO UPDATE SET rows = reading_counts.rows + excluded.rows"
REJECTION_INSERT = chain.Append("rejections", chain.REJECTION_FIELDS)
PAYLOAD_KEEP_BYTES = 512
#: How far back per-bin sums are kept: the event analysis reads four days before each pass.
BIN_WINDOW_S = 5 * 86400.0
BINS = (
    "SELECT k, sum(value), count(*) FROM (SELECT CAST(ts / ? AS INTEGER) AS k, value FROM readings "
    "WHERE zone = ? AND signal = ? AND ts > ? AND ts <= ?) b WHERE k >= ? AND k < ? GROUP BY k ORDER BY k"
)
ALL_BINS = (-(2**62), 2**62)


class Readings(Repo):
    """Readings are written to `reading_rows` (schema m016: names interned, the hash kept on
    some rows) and read through the `readings` view, which has the old columns."""

    def __init__(self, conn):
        super().__init__(conn)
        self._heads: dict[str, str | None] = {}  # each zone's running hash, valid while data_version holds
        self._heads_version = None
        self._series: dict[tuple[str, str, str], int] = {}
        self._topics: dict[str, int] = {}
        self._windows: dict[tuple[str, str], dict[float, BinWindow]] = {}  # per-bin sums, same validity
        self._hash = ReadingHasher()  # chain_hash, with the text of names and recent numbers kept
        self._months = partitions.Months() if is_pg(conn) else None  # PostgreSQL's monthly partitions
        self.retention: partitions.Pass | None = None  # set during a retention pass on PostgreSQL

    def _series_id(self, zone: str, sensor: str, signal: str) -> int:
        key = (zone, sensor, signal)
        sid = self._series.get(key)
        if sid is None:
            self.conn.execute("INSERT OR IGNORE INTO series (zone, sensor, signal) VALUES (?, ?, ?)", key)
            sid = self._series[key] = self.conn.execute(
                "SELECT id FROM series WHERE zone = ? AND sensor = ? AND signal = ?", key
            ).fetchone()[0]
        return sid

    def _topic_id(self, topic: str) -> int:
        tid = self._topics.get(topic)
        if tid is None:
            self.conn.execute("INSERT OR IGNORE INTO topics (topic) VALUES (?)", (topic,))
            tid = self._topics[topic] = self.conn.execute("SELECT id FROM topics WHERE topic = ?", (topic,)).fetchone()[
                0
            ]
        return tid

    def _fresh_heads(self) -> None:
        """Forget the cached heads and bin sums if another connection has committed since (they
        may have moved)."""
        version = data_version(self.conn)
        if version != self._heads_version:
            self._heads, self._heads_version, self._windows = {}, version, {}

    def _touch(self, zone: str, signal: str, ts: float) -> None:
        """A row of the series may be written at ts: its bin is no longer known."""
        for bin_s, window in self._windows.get((zone, signal), {}).items():
            window.forget(int(ts / bin_s))  # the bin as SQL's CAST(ts / bin_s AS INTEGER) makes it

    def _head(self, zone: str) -> str | None:
        """The zone's running hash: that of its newest row (whose hash is always kept); call
        _fresh_heads first, once for a batch."""
        if zone not in self._heads:
            claim_zone(self.conn, zone)
            row = walk.head_row(self.conn, zone)
            self._heads[zone] = row[1] if row else None
        return self._heads[zone]

    def add(self, reading, received_ts: float, topic: str, late: bool) -> bool:
        """Insert one reading (its hash kept); False when its natural key is already stored."""
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
        self._fresh_heads()
        head = self._hash(self._head(reading.zone), *values)
        row = (self._series_id(*values[:3]), *values[3:6], self._topic_id(topic), int(late), head)
        self._touch(reading.zone, reading.signal, reading.ts)
        if self._months is not None:
            self._months.ensure(self.conn, (reading.ts,))
        if self.conn.execute(ROW_INSERT, row).rowcount != 1:
            return False
        self._heads[reading.zone] = head
        self.conn.execute(COUNT_ADD, (reading.zone, 1))
        return True

    def add_all_new(self, items) -> bool:
        """Insert (reading, received_ts, topic) rows in one statement if none is stored yet;
        otherwise insert nothing and return False (the caller goes row by row).

        The chain is computed here in Python from each zone's newest hash; the hash is kept on
        every KEEP_EVERY-th row of a zone in the batch and on its last. That is safe with other
        writers: in WAL mode a write from a stale snapshot fails (SQLITE_BUSY_SNAPSHOT), the
        batch is retried and re-reads the heads."""
        # Names interned before the savepoint: a rollback to it must not leave cached ids of
        # series or topics it undid.
        ids = [(self._series_id(r.zone, r.sensor, r.signal), self._topic_id(topic)) for r, _, topic in items]
        if self._months is not None:  # before the savepoint: a rollback to it must not undo a month
            self._months.ensure(self.conn, {r.ts for r, _, _ in items})
        self.conn.execute("SAVEPOINT bulk")
        self._fresh_heads()
        heads = {zone: self._head(zone) for zone in {r.zone for r, _, _ in items}}
        last = {r.zone: i for i, (r, _, _) in enumerate(items)}
        seen: dict[str, int] = {}
        rows = []
        for i, (r, rts, topic) in enumerate(items):
            values = (r.zone, r.sensor, r.signal, r.ts, r.value, rts, topic, 0)
            heads[r.zone] = self._hash(heads[r.zone], *values)
            seen[r.zone] = n = seen.get(r.zone, 0) + 1
            keep = heads[r.zone] if i == last[r.zone] or n % KEEP_EVERY == 0 else None
            rows.append((ids[i][0], r.ts, r.value, rts, ids[i][1], 0, keep))
            self._touch(r.zone, r.signal, r.ts)
        before = self.conn.total_changes
        self.conn.executemany(ROW_INSERT, rows)
        if self.conn.total_changes - before == len(items):
            self.conn.executemany(COUNT_ADD, seen.items())
            self.conn.execute("RELEASE SAVEPOINT bulk")
            self._heads.update(heads)
            return True
        self.conn.execute("ROLLBACK TO SAVEPOINT bulk")
        self.conn.execute("RELEASE SAVEPOINT bulk")
        return False

    def forget_heads(self) -> None:
        """After a failed transaction or a fold: cached heads, series, topics and bin sums may
        name rows rolled back or deleted."""
        self._heads, self._heads_version = {}, None
        self._series, self._topics, self._windows = {}, {}, {}
        if self._months is not None:
            self._months.forget()  # a rolled-back batch may have made a partition

    def value_of(self, reading) -> float | None:
        """The stored value under the reading's natural key, if any."""
        row = self.conn.execute(
            "SELECT value FROM readings WHERE zone = ? AND sensor = ? AND signal = ? AND ts = ?",
            (reading.zone, reading.sensor, reading.signal, reading.ts),
        ).fetchone()
        return None if row is None else row[0]

    def sensors(self, zone: str) -> set[str]:
        sql = (
            "SELECT sensor FROM series s WHERE zone = ? AND EXISTS (SELECT 1 FROM reading_rows WHERE series = s.id) "
            "UNION SELECT DISTINCT sensor FROM readings_hourly WHERE zone = ?"
        )
        return {r[0] for r in self.conn.execute(sql, (zone, zone))}

    def newest_ts(self) -> float | None:
        """The newest reading time any checkpoint has seen (what the data say the time is)."""
        return self.conn.execute("SELECT max(last_ts) FROM zone_state").fetchone()[0]

    def of_zone(self, zone: str, after_ts: float | None = None, upto_ts: float | None = None) -> Iterator[tuple]:
        """(sensor, signal, ts, value) of a zone's raw model readings in time order."""
        sql = "SELECT sensor, signal, ts, value FROM readings WHERE zone = ? AND signal IN ('air_c', 'product_c')"
        args: list = [zone]
        if after_ts is not None:
            sql += " AND ts > ?"
            args.append(after_ts)
        if upto_ts is not None:
            sql += " AND ts <= ?"
            args.append(upto_ts)
        yield from stream(self.conn, sql + " ORDER BY ts, sensor, signal", args)

    def signals(self, zone: str, signals: tuple[str, ...], after_ts: float, upto_ts: float) -> list[tuple]:
        """(sensor, signal, ts, value) of the given signals in (after_ts, upto_ts], in time order."""
        return self.conn.execute(
            f"SELECT sensor, signal, ts, value FROM readings WHERE zone = ? AND signal IN ({marks(len(signals))}) "
            "AND ts > ? AND ts <= ? ORDER BY ts, sensor",
            (zone, *signals, after_ts, upto_ts),
        ).fetchall()

    def bins(self, zone: str, signal: str, after_ts: float, upto_ts: float, bin_s: float) -> BinArrays:
        """Bin numbers, sums and counts of a signal's readings in (after_ts, upto_ts] per bin of
        bin_s seconds (bin k covers [k bin_s, (k + 1) bin_s)), in bin order, bins without
        readings left out: the sums are made here, so a week of many sensors leaves the
        database as one row a minute.

        Whole bins of the last BIN_WINDOW_S are kept from earlier answers (bincache), so a pass
        that reads the same days again asks the database only for the bins written since."""
        if not (math.isfinite(after_ts) and math.isfinite(upto_ts)):
            return as_arrays(self._bins(zone, signal, after_ts, upto_ts, bin_s))
        ka, kb = int(after_ts / bin_s), int(upto_ts / bin_s)  # the edge bins, as the query numbers them
        if kb - ka < 2:
            return as_arrays(self._bins(zone, signal, after_ts, upto_ts, bin_s))
        self._fresh_heads()
        window = self._windows.setdefault((zone, signal), {}).get(bin_s)
        if window is None:
            window = self._windows[(zone, signal)][bin_s] = BinWindow(max(2, int(BIN_WINDOW_S / bin_s)))
        window.slide(kb)
        lo, hi = ka + 1, kb  # the whole bins inside (after_ts, upto_ts]
        m = window.first_unknown(lo, hi)
        if m == lo:
            rows = self._bins(zone, signal, after_ts, upto_ts, bin_s)
            window.store(rows, lo, hi)
            return as_arrays(rows)
        # Edge reads go by bin number; the time bounds, a bin wider, only narrow the index range.
        head = self._bins(zone, signal, after_ts, (lo + 1) * bin_s, bin_s, (ALL_BINS[0], lo))
        tail = self._bins(zone, signal, (m - 1) * bin_s, upto_ts, bin_s, (m, ALL_BINS[1]))
        window.store(tail, m, hi)
        parts = [as_arrays(head), window.arrays(lo, m), as_arrays(tail)]
        return tuple(np.concatenate([p[i] for p in parts]) for i in range(3))

    def _bins(self, zone: str, signal: str, after_ts: float, upto_ts: float, bin_s: float, ks=ALL_BINS) -> list[tuple]:
        return self.conn.execute(BINS, (float(bin_s), zone, signal, after_ts, upto_ts, *ks)).fetchall()

    def newest_of(self, zone: str) -> float | None:
        """The time of the zone's newest stored raw reading (an index seek a series)."""
        return self.conn.execute(NEWEST, (zone,)).fetchone()[0]

    def summary(self, zone: str) -> tuple[int, float | None]:
        """Readings stored for the zone (raw, plus those folded into hourly rows: the count kept
        as they were written) and the newest time (an index seek): no count of the history."""
        row = self.conn.execute("SELECT rows FROM reading_counts WHERE zone = ?", (zone,)).fetchone()
        return (row[0] if row else 0), self.newest_of(zone)

    def last_received(self, zone: str, recent_s: float = 2 * 86400.0) -> dict[tuple[str, str], float]:
        """(sensor, signal) -> newest receive time, for the signals sent at a steady rate (air and
        product temperatures; door and defrost report on change), among readings up to recent_s
        older than the zone's newest (an index range, not a scan of the zone's whole history)."""
        rows = self.conn.execute(
            "SELECT sensor, signal, max(received_ts) FROM readings WHERE zone = ? AND signal IN ('air_c', 'product_c') "
            f"AND ts >= ({NEWEST}) - ? GROUP BY sensor, signal",
            (zone, zone, recent_s),
        )
        return {(sensor, signal): t for sensor, signal, t in rows.fetchall()}

    def switch_state(self, zone: str) -> list[tuple[str, str, float, float, float]]:
        """Per door/defrost sensor: (sensor, signal, last ts, last value, since) where since is
        the first reading after the last 'off' one (when the current 'on' began)."""
        out = []
        for sensor, signal, ts in self.conn.execute(
            "SELECT sensor, signal, max(ts) FROM readings WHERE zone = ? AND signal IN ('door', 'defrost') "
            f"AND ts >= ({NEWEST}) - 30 * 86400.0 GROUP BY sensor, signal",
            (zone, zone),
        ).fetchall():
            value = self.conn.execute(
                "SELECT value FROM readings WHERE zone = ? AND sensor = ? AND signal = ? AND ts = ?",
                (zone, sensor, signal, ts),
            ).fetchone()[0]
            since = self.conn.execute(
                "SELECT min(ts) FROM readings WHERE zone = ? AND sensor = ? AND signal = ? AND ts > coalesce("
                "(SELECT max(ts) FROM readings WHERE zone = ? AND sensor = ? AND signal = ? AND value < 0.5), -1e300)",
                (zone, sensor, signal, zone, sensor, signal),
            ).fetchone()[0]
            out.append((sensor, signal, ts, value, since if since is not None else ts))
        return out

    def fold(self, zone: str, upto_ts: float, wall_ts: float) -> int:
        """Fold a zone's raw readings with ts <= upto_ts into hourly aggregates; return how many."""
        self.forget_heads()
        self.conn.execute(
            "INSERT INTO readings_hourly (zone, sensor, signal, hour_ts, mean, min, max, n) "
            "SELECT zone, sensor, signal, CAST(ts / 3600 AS INTEGER) * 3600.0, avg(value), min(value), max(value), count(*) "
            "FROM readings WHERE zone = ? AND ts <= ? GROUP BY zone, sensor, signal, CAST(ts / 3600 AS INTEGER) "
            "ON CONFLICT(zone, sensor, signal, hour_ts) DO UPDATE SET "
            "mean = (readings_hourly.mean * readings_hourly.n + excluded.mean * excluded.n) / (readings_hourly.n + excluded.n), "
            "min = CASE WHEN excluded.min < readings_hourly.min THEN excluded.min ELSE readings_hourly.min END, "
            "max = CASE WHEN excluded.max > readings_hourly.max THEN excluded.max ELSE readings_hourly.max END, "
            "n = readings_hourly.n + excluded.n",
            (zone, upto_ts),
        )
        return _cut_zone(self.conn, zone, upto_ts, wall_ts, self.retention)


class Rejections(Repo):
    def add(self, received_ts: float, topic: str, reason: str, payload: bytes, n: int = 1) -> None:
        """One rejected message (or n like it, when a topic's rejections are rate-limited)."""
        kept = text(payload[:PAYLOAD_KEEP_BYTES].decode("utf-8", errors="backslashreplace"))
        values = (received_ts, text(topic[:512]), text(reason), kept, n)
        REJECTION_INSERT.run(self.conn, values)

    def since(self, since_ts: float) -> int:
        """Messages rejected since then (a rate-limited row stands for n of them)."""
        sql = "SELECT coalesce(sum(n), 0) FROM rejections WHERE received_ts >= ?"
        return self.conn.execute(sql, (since_ts,)).fetchone()[0]

    def prune(self, upto_ts: float, wall_ts: float) -> int:
        """Delete rejections received at or before upto_ts (with the raw readings' retention)."""
        return cut(self.conn, "rejections", "", "received_ts", upto_ts, wall_ts)


class Held(Repo):
    """Messages whose time disagrees with the service clock, kept until the clocks agree."""

    def add(self, received_ts: float, topic: str, payload: bytes, reason: str) -> None:
        self.conn.execute(
            "INSERT INTO held (received_ts, topic, payload, reason) VALUES (?,?,?,?)",
            (received_ts, text(topic), payload, text(reason)),
        )

    def oldest(self, limit: int) -> list[tuple]:
        """(id, received_ts, topic, payload, reason), oldest first."""
        return self.conn.execute(
            "SELECT id, received_ts, topic, payload, reason FROM held ORDER BY id LIMIT ?", (limit,)
        ).fetchall()

    def remove(self, ids: list[int]) -> None:
        self.conn.executemany("DELETE FROM held WHERE id = ?", [(i,) for i in ids])


def _cut_zone(conn, zone: str, upto_ts: float, wall_ts: float, retention: partitions.Pass | None = None) -> int:
    """Delete a zone's readings at or before the cut-off, keeping its chain verifiable: for
    each surviving row whose row before it is deleted, that row's running hash (recomputed,
    as most rows keep none) goes into the chained fold record with the pass itself. In a
    retention pass on PostgreSQL the rows of months wholly before the cut-off are left for the
    pass's end, which drops those months (store/partitions.py)."""
    series = walk.zone_series(conn, zone)
    in_zone = f"series IN ({marks(len(series))})"
    n = conn.execute(f"SELECT count(*) FROM reading_rows WHERE {in_zone} AND ts <= ?", (*series, upto_ts)).fetchone()[0]
    if not n:
        return 0
    pairs = conn.execute(
        f"SELECT id, prev_id FROM (SELECT id, ts AS t, lag(id) OVER (ORDER BY id) AS prev_id, "
        f"lag(ts) OVER (ORDER BY id) AS prev_t FROM reading_rows WHERE {in_zone}) w WHERE t > ? AND prev_t <= ?",
        (*series, upto_ts, upto_ts),
    ).fetchall()
    links = []
    if pairs:
        meta = dict(conn.execute("SELECT key, value FROM record_meta"))
        folds = chain.fold_links(conn)
        hashes = walk.running(conn, zone, max(p for _, p in pairs), folds, meta.get("chained_from:readings", 0.0))
        links = [(row_id, hashes.get(prev_id)) for row_id, prev_id in pairs]
    chain.add_fold(conn, "readings", zone, links, n, upto_ts, wall_ts)
    if retention is None:
        conn.execute(f"DELETE FROM reading_rows WHERE {in_zone} AND ts <= ?", (*series, upto_ts))
        return n
    split_ts = partitions.split(upto_ts)
    conn.execute(f"DELETE FROM reading_rows WHERE {in_zone} AND ts >= ? AND ts <= ?", (*series, split_ts, upto_ts))
    retention.defer(series, split_ts)
    return n


def cut(conn, table: str, zone: str, time_col: str, upto_ts: float, wall_ts: float) -> int:
    """Delete a log's rows at or before the cut-off (rejections; readings go by _cut_zone),
    keeping the chain verifiable: each surviving row's link to a deleted predecessor (every
    row of a log keeps its hash), and the pass itself, go into the chained fold record."""
    n = conn.execute(f"SELECT count(*) FROM {table} WHERE {time_col} <= ?", (upto_ts,)).fetchone()[0]
    if not n:
        return 0
    links = conn.execute(
        f"SELECT id, prev FROM (SELECT id, {time_col} AS t, lag(chain) OVER (ORDER BY id) AS prev, "
        f"lag({time_col}) OVER (ORDER BY id) AS prev_t FROM {table}) w WHERE t > ? AND prev_t <= ?",
        (upto_ts, upto_ts),
    ).fetchall()
    chain.add_fold(conn, table, zone, links, n, upto_ts, wall_ts)
    conn.execute(f"DELETE FROM {table} WHERE {time_col} <= ?", (upto_ts,))
    return n
