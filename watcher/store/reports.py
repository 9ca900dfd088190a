"""Weekly summaries: the record of those produced, and the rows a summary reads, as
(columns, rows) per table: the SQL stays in the store, the report turns them into frames
(report/data.py)."""

from __future__ import annotations

import json

from watcher.store.bincache import BinArrays, as_arrays
from watcher.store.readings import ALL_BINS, BINS
from watcher.store.repo import Repo, marks
from watcher.store.subjects import LOT_PREFIX, SERVICE_KEY

Table = tuple[list[str], list[tuple]]


def _table(conn, sql: str, args: tuple) -> Table:
    cur = conn.execute(sql, args)
    return [d[0] for d in cur.description], cur.fetchall()


class Reports(Repo):
    def add(self, site: str, week: str, generated_ts: float, heads: dict, digest: str, files: dict) -> None:
        self.conn.execute(
            "INSERT INTO reports (site, week, generated_ts, heads, digest, files) VALUES (?,?,?,?,?,?)",
            (site, week, generated_ts, json.dumps(heads), digest, json.dumps(files)),
        )

    def scheduled(self, site: str, week: str) -> bool:
        """True once the schedule (not a person) has produced that site's summary for the week."""
        rows = self.conn.execute("SELECT files FROM reports WHERE site = ? AND week = ?", (site, week))
        return any(json.loads(files).get("auto") in (1, True) for (files,) in rows)

    def week_tables(
        self, zone_ids: tuple[str, ...], start_ts: float, end_ts: float, days: tuple[str, ...]
    ) -> dict[str, Table]:
        return week_tables(self.conn, zone_ids, start_ts, end_ts, days)

    def zone_bins(
        self, zone_ids: tuple[str, ...], signal: str, after_ts: float, upto_ts: float, bin_s: float
    ) -> dict[str, BinArrays]:
        """Per zone, what Readings.bins gives for (after_ts, upto_ts], for many zones at once.

        Rows are stored in arrival order, each page holding every zone's readings of a few
        seconds, so reading the zones one by one through the index reads every page of the
        span once per zone. Here the span's rows are read once, in row order, between the
        first and last row ids the index finds for it (an index-only pass); a span whose rows
        are spread far wider than that (a backfill long after) goes zone by zone instead."""
        series = self.conn.execute(
            f"SELECT id FROM series WHERE signal = ? AND zone IN ({marks(len(zone_ids))})", (signal, *zone_ids)
        ).fetchall()
        ids = [s for (s,) in series]
        out = {z: as_arrays([]) for z in zone_ids}
        if not ids:
            return out
        lo, hi, n = self.conn.execute(
            f"SELECT min(id), max(id), count(*) FROM reading_rows WHERE series IN ({marks(len(ids))}) "
            "AND ts > ? AND ts <= ?",
            (*ids, after_ts, upto_ts),
        ).fetchone()
        if not n:
            return out
        every = self.conn.execute("SELECT count(*) FROM series").fetchone()[0]
        if hi - lo + 1 > 4 * n * every / len(ids):  # other series interleave; far wider: a late backfill
            return {z: as_arrays(self._zone_bins_indexed(z, signal, after_ts, upto_ts, bin_s)) for z in zone_ids}
        # The unary + keeps the planner on the row range (not the key index, zone by zone again).
        rows = self.conn.execute(
            "SELECT s.zone, CAST(r.ts / ? AS INTEGER) AS k, sum(r.value), count(*) FROM reading_rows r "
            f"JOIN series s ON s.id = r.series WHERE r.id BETWEEN ? AND ? AND +r.series IN ({marks(len(ids))}) "
            "AND r.ts > ? AND r.ts <= ? GROUP BY s.zone, k ORDER BY s.zone, k",
            (float(bin_s), lo, hi, *ids, after_ts, upto_ts),
        ).fetchall()
        by_zone: dict[str, list] = {}
        for zone, *rest in rows:
            by_zone.setdefault(zone, []).append(rest)
        return {**out, **{z: as_arrays(r) for z, r in by_zone.items()}}

    def _zone_bins_indexed(self, zone: str, signal: str, after_ts: float, upto_ts: float, bin_s: float) -> list:
        return self.conn.execute(BINS, (float(bin_s), zone, signal, after_ts, upto_ts, *ALL_BINS)).fetchall()

    def sensor_weeks(self, zone_ids: tuple[str, ...], start_ts: float, end_ts: float):
        """Per sensor and signal of the zones in [start_ts, end_ts): (zone, sensor, signal, the
        reading times in order, how many were late), one sensor at a time, so memory holds one
        sensor's week, never the site's."""
        yield from self._sensor_weeks(zone_ids, start_ts, end_ts)

    def _sensor_weeks(self, zone_ids: tuple[str, ...], start_ts: float, end_ts: float):
        for zone in zone_ids:
            for sensor, signal in self._keys(zone):
                # Covering index (zone, sensor, signal, ts): the table itself is not read.
                times = [
                    r[0]
                    for r in self.conn.execute(
                        "SELECT ts FROM readings WHERE zone = ? AND sensor = ? AND signal = ? AND ts >= ? AND ts < ? "
                        "ORDER BY ts",
                        (zone, sensor, signal, start_ts, end_ts),
                    )
                ]
                if not times:
                    continue
                late = self.conn.execute(
                    "SELECT count(*) FROM readings WHERE zone = ? AND sensor = ? AND signal = ? AND late = 1 "
                    "AND ts >= ? AND ts < ?",
                    (zone, sensor, signal, start_ts, end_ts),
                ).fetchone()[0]
                yield zone, sensor, signal, times, late

    def _keys(self, zone: str):
        """The zone's (sensor, signal) pairs that have raw readings (the series table; an index
        seek each), whatever the history."""
        yield from self.conn.execute(
            "SELECT sensor, signal FROM series s WHERE zone = ? AND EXISTS (SELECT 1 FROM reading_rows "
            "WHERE series = s.id) ORDER BY sensor, signal",
            (zone,),
        ).fetchall()

    def peak(self, zone: str, signal: str, start_ts: float, end_ts: float) -> float | None:
        """The highest value of a zone's signal in [start_ts, end_ts] (an index range)."""
        sql = "SELECT max(value) FROM readings WHERE zone = ? AND signal = ? AND ts >= ? AND ts <= ?"
        return self.conn.execute(sql, (zone, signal, start_ts, end_ts)).fetchone()[0]


def week_tables(
    conn, zone_ids: tuple[str, ...], start_ts: float, end_ts: float, days: tuple[str, ...]
) -> dict[str, Table]:
    """Events, alerts (with the service's and the site's lots'), their log, gaps, rejections and
    daily growth of a site's zones for [start_ts, end_ts). The week's raw readings are not
    among them: a big site's week is millions of rows (see sensor_weeks and peak)."""
    ids, s, e = zone_ids, start_ts, end_ts
    out = {
        "events": _table(
            conn,
            f"SELECT id, zone, kind, start_ts, end_ts, detail FROM events WHERE zone IN ({marks(len(ids))}) "
            "AND start_ts < ? AND (end_ts IS NULL OR end_ts > ?) ORDER BY start_ts",
            (*ids, e, s),
        ),
        "alerts": _table(
            conn,
            f"SELECT * FROM alerts WHERE (zone IN ({marks(len(ids) + 1)}) OR zone IN (SELECT '{LOT_PREFIX}' || lot FROM lot_events "
            f"WHERE zone IN ({marks(len(ids))}))) AND raised_ts < ? AND (cleared_ts IS NULL OR cleared_ts >= ?) ORDER BY raised_ts",
            (*ids, SERVICE_KEY, *ids, e, s),
        ),
        "gaps": _table(
            conn,
            f"SELECT zone, start_ts, end_ts, seconds FROM gaps WHERE zone IN ({marks(len(ids))}) AND start_ts < ? "
            "AND end_ts > ? ORDER BY start_ts",
            (*ids, e, s),
        ),
        "rejections": _table(
            conn,
            "SELECT received_ts, topic, reason, n FROM rejections WHERE received_ts >= ? AND received_ts < ?",
            (s, e),
        ),
        "daily": _table(
            conn,
            f"SELECT * FROM daily_growth WHERE zone IN ({marks(len(ids))}) AND day IN ({marks(len(days))}) ORDER BY zone, day",
            (*ids, *days),
        ),
    }
    cols, rows = out["alerts"]
    alert_ids = tuple(int(r[cols.index("id")]) for r in rows)
    out["alert_log"] = _table(
        conn,
        f"SELECT alert_id, step, at_ts, wall_ts, by, note FROM alert_log WHERE alert_id IN ({marks(len(alert_ids))}) ORDER BY id",
        alert_ids,
    )
    return out
