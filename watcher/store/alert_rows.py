"""Rows for events, alerts and the model snapshots the attribution starts from."""

from __future__ import annotations

import json

from watcher.store import chain

ALERT_LOG_INSERT = chain.insert_sql("alert_log", chain.ALERT_LOG_FIELDS, zone_scoped=False)
EVENT_LOG_INSERT = chain.insert_sql("event_log", chain.EVENT_LOG_FIELDS, zone_scoped=False)

ALERT_COLUMNS = (
    "id",
    "zone",
    "rule",
    "severity",
    "label",
    "metric",
    "threshold",
    "status",
    "since_s",
    "raised_s",
    "value",
    "worst_value",
    "acked_s",
    "acked_by",
    "ack_note",
    "cleared_s",
    "escalated_s",
    "repeats",
)


class AlertRows:
    conn = None  # set by Store

    def alert_states(self) -> dict[tuple[str, str], dict]:
        return {(z, r): json.loads(s) for z, r, s in self.conn.execute("SELECT zone, rule, state FROM alert_state")}

    def save_alert_state(self, zone: str, rule: str, state: dict) -> None:
        self.conn.execute(
            "INSERT OR REPLACE INTO alert_state (zone, rule, state) VALUES (?,?,?)", (zone, rule, json.dumps(state))
        )

    def alert_insert(self, **row) -> int:
        cols = ", ".join(row)
        cur = self.conn.execute(
            f"INSERT INTO alerts ({cols}) VALUES ({', '.join('?' * len(row))})", tuple(row.values())
        )
        return int(cur.lastrowid)

    def alert_update(self, alert_id: int, **fields) -> None:
        sets = ", ".join(f"{k} = ?" for k in fields)
        self.conn.execute(f"UPDATE alerts SET {sets} WHERE id = ?", (*fields.values(), alert_id))

    def alert_log_add(self, alert_id: int, step: str, at_s: float, wall_s: float, value=None, by=None, note=None):
        self.conn.execute(ALERT_LOG_INSERT, chain.params((alert_id, step, at_s, wall_s, value, by, note)))

    def alerts_list(self, open_only: bool = False, limit: int = 500) -> list[dict]:
        sql = f"SELECT {', '.join(ALERT_COLUMNS)} FROM alerts"
        if open_only:
            sql += " WHERE status IN ('open', 'acknowledged')"
        rows = self.conn.execute(sql + " ORDER BY id DESC LIMIT ?", (limit,))
        return [dict(zip(ALERT_COLUMNS, r)) for r in rows]

    def alert_get(self, alert_id: int) -> dict | None:
        row = self.conn.execute(f"SELECT {', '.join(ALERT_COLUMNS)} FROM alerts WHERE id = ?", (alert_id,)).fetchone()
        return None if row is None else dict(zip(ALERT_COLUMNS, row))

    def alert_log(self, alert_id: int) -> list[tuple]:
        return self.conn.execute(
            "SELECT step, at_s, wall_s, value, by, note FROM alert_log WHERE alert_id = ? ORDER BY id", (alert_id,)
        ).fetchall()

    def command_add(self, alert_id: int, by: str, note: str | None, source: str, sender: str | None, now_s: float):
        cur = self.conn.execute(
            "INSERT INTO alert_commands (alert_id, by, note, source, sender, received_s) VALUES (?,?,?,?,?,?)",
            (alert_id, by, note, source, sender, now_s),
        )
        return int(cur.lastrowid)

    def commands_pending(self) -> list[tuple]:
        return self.conn.execute(
            "SELECT id, alert_id, by, note, source, sender FROM alert_commands WHERE done_s IS NULL ORDER BY id"
        ).fetchall()

    def command_done(self, command_id: int, now_s: float, result: str) -> None:
        self.conn.execute("UPDATE alert_commands SET done_s = ?, result = ? WHERE id = ?", (now_s, result, command_id))

    def command_result(self, command_id: int) -> str | None:
        row = self.conn.execute("SELECT result FROM alert_commands WHERE id = ?", (command_id,)).fetchone()
        return None if row is None else row[0]


class EventRows:
    conn = None  # set by Store

    def event_upsert(self, zone: str, kind: str, start_ts: float, end_ts: float | None, detail: dict) -> None:
        """Insert or update an event; detail keys merge into what is stored (costs are kept)."""
        self.conn.execute(
            "INSERT INTO events (zone, kind, start_ts, end_ts, detail) VALUES (?,?,?,?,?) "
            "ON CONFLICT(zone, kind, start_ts) DO UPDATE SET end_ts = excluded.end_ts, "
            "detail = json_patch(events.detail, excluded.detail)",
            (zone, kind, start_ts, end_ts, json.dumps(detail)),
        )
        row = self.conn.execute(
            "SELECT id, end_ts, detail FROM events WHERE zone = ? AND kind = ? AND start_ts = ?", (zone, kind, start_ts)
        ).fetchone()
        self.conn.execute(EVENT_LOG_INSERT, chain.params((row[0], "set", zone, kind, start_ts, row[1], row[2])))

    def events_for(self, zone: str, since_ts: float, until_ts: float | None = None) -> list[dict]:
        """Events of a zone that end after since_ts (or are still open) and start before until_ts."""
        sql = "SELECT id, kind, start_ts, end_ts, detail FROM events WHERE zone = ? AND (end_ts IS NULL OR end_ts >= ?)"
        args: list = [zone, since_ts]
        if until_ts is not None:
            sql += " AND start_ts < ?"
            args.append(until_ts)
        rows = self.conn.execute(sql + " ORDER BY start_ts", args)
        return [{"id": r[0], "kind": r[1], "start_ts": r[2], "end_ts": r[3], **json.loads(r[4])} for r in rows]

    def event_delete(self, event_id: int) -> None:
        row = self.conn.execute(
            "SELECT zone, kind, start_ts, end_ts, detail FROM events WHERE id = ?", (event_id,)
        ).fetchone()
        if row is not None:
            self.conn.execute(EVENT_LOG_INSERT, chain.params((event_id, "delete", *row)))
        self.conn.execute("DELETE FROM events WHERE id = ?", (event_id,))

    def signal_rows(self, zone: str, signals: tuple[str, ...], after_ts: float, upto_ts: float) -> list[tuple]:
        """(sensor, signal, ts, value) of the given signals in (after_ts, upto_ts], in time order."""
        marks = ", ".join("?" * len(signals))
        return self.conn.execute(
            f"SELECT sensor, signal, ts, value FROM readings WHERE zone = ? AND signal IN ({marks}) "
            "AND ts > ? AND ts <= ? ORDER BY ts, sensor",
            (zone, *signals, after_ts, upto_ts),
        ).fetchall()

    def last_received(self, zone: str, recent_s: float = 2 * 86400.0) -> dict[str, float]:
        """Each sensor's newest receive time, among readings up to recent_s older than the
        zone's newest (an index range, not a scan of the zone's whole history)."""
        rows = self.conn.execute(
            "SELECT sensor, max(received_ts) FROM readings WHERE zone = ? AND ts >= "
            "(SELECT max(ts) FROM readings WHERE zone = ?) - ? GROUP BY sensor",
            (zone, zone, recent_s),
        )
        return dict(rows.fetchall())

    def marks(self) -> dict[tuple[str, str], float]:
        return {(z, m): v for z, m, v in self.conn.execute("SELECT zone, mark, value FROM zone_marks")}

    def set_mark(self, zone: str, mark: str, value: float) -> None:
        self.conn.execute("INSERT OR REPLACE INTO zone_marks (zone, mark, value) VALUES (?,?,?)", (zone, mark, value))

    def switch_state(self, zone: str) -> list[tuple[str, str, float, float, float]]:
        """Per door/defrost sensor: (sensor, signal, last ts, last value, since) where since is
        the first reading after the last 'off' one (when the current 'on' began)."""
        out = []
        for sensor, signal, ts, value in self.conn.execute(
            "SELECT sensor, signal, max(ts), value FROM readings WHERE zone = ? AND signal IN ('door', 'defrost') "
            "AND ts >= (SELECT max(ts) FROM readings WHERE zone = ?) - 30 * 86400.0 GROUP BY sensor, signal",
            (zone, zone),
        ).fetchall():
            since = self.conn.execute(
                "SELECT min(ts) FROM readings WHERE zone = ? AND sensor = ? AND signal = ? AND ts > coalesce("
                "(SELECT max(ts) FROM readings WHERE zone = ? AND sensor = ? AND signal = ? AND value < 0.5), -1e300)",
                (zone, sensor, signal, zone, sensor, signal),
            ).fetchone()[0]
            out.append((sensor, signal, ts, value, since if since is not None else ts))
        return out

    def alert_open_id(self, zone: str, rule: str) -> int | None:
        """The newest open or acknowledged alert of that zone and rule."""
        row = self.conn.execute(
            "SELECT id FROM alerts WHERE zone = ? AND rule = ? AND status IN ('open', 'acknowledged') "
            "ORDER BY id DESC LIMIT 1",
            (zone, rule),
        ).fetchone()
        return None if row is None else row[0]

    def alert_steps_after(self, log_id: int, steps: tuple[str, ...]) -> list[tuple]:
        """(log id, step, at_s, zone, severity, label) of alert log rows after log_id."""
        return self.conn.execute(
            "SELECT l.id, l.step, l.at_s, a.zone, a.severity, a.label FROM alert_log l JOIN alerts a "
            f"ON a.id = l.alert_id WHERE l.id > ? AND l.step IN ({', '.join('?' * len(steps))}) ORDER BY l.id",
            (log_id, *steps),
        ).fetchall()

    def report_add(self, site: str, week: str, generated_s: float, heads: dict, digest: str, files: dict) -> None:
        self.conn.execute(
            "INSERT INTO reports (site, week, generated_s, heads, digest, files) VALUES (?,?,?,?,?,?)",
            (site, week, generated_s, json.dumps(heads), digest, json.dumps(files)),
        )

    def report_scheduled(self, site: str, week: str) -> bool:
        """True once the schedule (not a person) has produced that site's summary for the week."""
        sql = "SELECT 1 FROM reports WHERE site = ? AND week = ? AND json_extract(files, '$.auto') = 1"
        return self.conn.execute(sql, (site, week)).fetchone() is not None

    def rejections_since(self, since_s: float) -> int:
        """Messages rejected since then (a rate-limited row stands for n of them)."""
        sql = "SELECT coalesce(sum(n), 0) FROM rejections WHERE received_ts >= ?"
        return self.conn.execute(sql, (since_s,)).fetchone()[0]

    def snapshot_save(self, zone: str, t_s: float, spec_key: str, blob: bytes) -> None:
        self.conn.execute(
            "INSERT OR REPLACE INTO zone_snapshots (zone, t_s, spec_key, state) VALUES (?,?,?,?)",
            (zone, t_s, spec_key, blob),
        )

    def snapshot_before(self, zone: str, t_s: float, spec_key: str) -> tuple[float, bytes] | None:
        return self.conn.execute(
            "SELECT t_s, state FROM zone_snapshots WHERE zone = ? AND spec_key = ? AND t_s <= ? ORDER BY t_s DESC LIMIT 1",
            (zone, spec_key, t_s),
        ).fetchone()

    def snapshot_first_after(self, zone: str, t0_s: float, t1_s: float, spec_key: str) -> tuple[float, bytes] | None:
        return self.conn.execute(
            "SELECT t_s, state FROM zone_snapshots WHERE zone = ? AND spec_key = ? AND t_s > ? AND t_s < ? "
            "ORDER BY t_s LIMIT 1",
            (zone, spec_key, t0_s, t1_s),
        ).fetchone()

    def snapshot_first_ts(self, zone: str, spec_key: str) -> float | None:
        return self.conn.execute(
            "SELECT min(t_s) FROM zone_snapshots WHERE zone = ? AND spec_key = ?", (zone, spec_key)
        ).fetchone()[0]

    def snapshots_drop(self, zone: str, before_ts: float | None = None, after_ts: float | None = None) -> None:
        if before_ts is not None:  # older than that, keep the first of each UTC day (for reports)
            self.conn.execute(
                "DELETE FROM zone_snapshots WHERE zone = ? AND t_s < ? AND t_s NOT IN ("
                "SELECT min(t_s) FROM zone_snapshots WHERE zone = ? GROUP BY CAST(t_s / 86400 AS INTEGER))",
                (zone, before_ts, zone),
            )
        if after_ts is not None:
            self.conn.execute("DELETE FROM zone_snapshots WHERE zone = ? AND t_s >= ?", (zone, after_ts))

    def daily_save(self, row: dict) -> None:
        cols = ", ".join(row)
        self.conn.execute(
            f"INSERT OR REPLACE INTO daily_growth ({cols}) VALUES ({', '.join('?' * len(row))})", tuple(row.values())
        )

    def daily_days(self, zone: str) -> set[str]:
        return {r[0] for r in self.conn.execute("SELECT day FROM daily_growth WHERE zone = ?", (zone,))}

    def daily_rows(self, zone: str | None = None) -> list[dict]:
        cur = self.conn.execute(
            "SELECT * FROM daily_growth" + (" WHERE zone = ?" if zone else "") + " ORDER BY zone, day",
            (zone,) if zone else (),
        )
        names = [d[0] for d in cur.description]
        return [dict(zip(names, r)) for r in cur.fetchall()]
