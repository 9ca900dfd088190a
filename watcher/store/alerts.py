"""Alerts (with their chained log and their state per rule), the commands that acknowledge them,
and events (with their chained log)."""

from __future__ import annotations

import json

from watcher.store import chain
from watcher.store.repo import Repo, marks, upsert

ALERT_LOG_INSERT = chain.Append("alert_log", chain.ALERT_LOG_FIELDS)
EVENT_LOG_INSERT = chain.Append("event_log", chain.EVENT_LOG_FIELDS)

ALERT_COLUMNS = (
    "id",
    "zone",
    "rule",
    "severity",
    "label",
    "metric",
    "threshold",
    "status",
    "since_ts",
    "raised_ts",
    "value",
    "worst_value",
    "acked_ts",
    "acked_by",
    "ack_note",
    "cleared_ts",
    "escalated_ts",
    "repeats",
)


class Alerts(Repo):
    def states(self) -> dict[tuple[str, str], dict]:
        return {(z, r): json.loads(s) for z, r, s in self.conn.execute("SELECT zone, rule, state FROM alert_state")}

    def state_save(self, zone: str, rule: str, state: dict) -> None:
        self.conn.execute(upsert("alert_state", "zone, rule, state", "zone, rule"), (zone, rule, json.dumps(state)))

    def add(self, **row) -> int:
        cols = ", ".join(row)
        cur = self.conn.execute(f"INSERT INTO alerts ({cols}) VALUES ({marks(len(row))})", tuple(row.values()))
        return int(cur.lastrowid)

    def update(self, alert_id: int, **fields) -> None:
        sets = ", ".join(f"{k} = ?" for k in fields)
        self.conn.execute(f"UPDATE alerts SET {sets} WHERE id = ?", (*fields.values(), alert_id))

    def log_add(self, alert_id: int, step: str, at_ts: float, wall_ts: float, value=None, by=None, note=None):
        log_step(self.conn, alert_id, step, at_ts, wall_ts, value, by, note)

    def list(self, open_only: bool = False, limit: int = 500) -> list[dict]:
        sql = f"SELECT {', '.join(ALERT_COLUMNS)} FROM alerts"
        if open_only:
            sql += " WHERE status IN ('open', 'acknowledged')"
        rows = self.conn.execute(sql + " ORDER BY id DESC LIMIT ?", (limit,))
        return [dict(zip(ALERT_COLUMNS, r)) for r in rows]

    def get(self, alert_id: int) -> dict | None:
        row = self.conn.execute(f"SELECT {', '.join(ALERT_COLUMNS)} FROM alerts WHERE id = ?", (alert_id,)).fetchone()
        return None if row is None else dict(zip(ALERT_COLUMNS, row))

    def log(self, alert_id: int) -> list[tuple]:
        return self.conn.execute(
            "SELECT step, at_ts, wall_ts, value, by, note FROM alert_log WHERE alert_id = ? ORDER BY id", (alert_id,)
        ).fetchall()

    def open_id(self, zone: str, rule: str) -> int | None:
        """The newest open or acknowledged alert of that zone and rule."""
        row = self.conn.execute(
            "SELECT id FROM alerts WHERE zone = ? AND rule = ? AND status IN ('open', 'acknowledged') "
            "ORDER BY id DESC LIMIT 1",
            (zone, rule),
        ).fetchone()
        return None if row is None else row[0]

    def steps_after(self, log_id: int, steps: tuple[str, ...]) -> list[tuple]:
        """(log id, step, at_ts, zone, severity, label) of alert log rows after log_id."""
        return self.conn.execute(
            "SELECT l.id, l.step, l.at_ts, a.zone, a.severity, a.label FROM alert_log l JOIN alerts a "
            f"ON a.id = l.alert_id WHERE l.id > ? AND l.step IN ({marks(len(steps))}) ORDER BY l.id",
            (log_id, *steps),
        ).fetchall()


class Commands(Repo):
    """Acknowledgements asked for (by the command line or MQTT), done by the writer."""

    def add(self, alert_id: int, by: str, note: str | None, source: str, sender: str | None, now_ts: float):
        cur = self.conn.execute(
            "INSERT INTO alert_commands (alert_id, by, note, source, sender, received_ts) VALUES (?,?,?,?,?,?)",
            (alert_id, by, note, source, sender, now_ts),
        )
        return int(cur.lastrowid)

    def pending(self) -> list[tuple]:
        return self.conn.execute(
            "SELECT id, alert_id, by, note, source, sender FROM alert_commands WHERE done_ts IS NULL ORDER BY id"
        ).fetchall()

    def done(self, command_id: int, now_ts: float, result: str) -> None:
        self.conn.execute(
            "UPDATE alert_commands SET done_ts = ?, result = ? WHERE id = ?", (now_ts, result, command_id)
        )

    def result(self, command_id: int) -> str | None:
        row = self.conn.execute("SELECT result FROM alert_commands WHERE id = ?", (command_id,)).fetchone()
        return None if row is None else row[0]


EVENT_COLUMNS = "SELECT id, kind, start_ts, end_ts, detail FROM events"


class Events(Repo):
    def upsert(self, zone: str, kind: str, start_ts: float, end_ts: float | None, detail: dict) -> None:
        """Insert or update an event; detail keys merge into what is stored (costs are kept)."""
        key = (zone, kind, start_ts)
        stored = self.conn.execute(
            "SELECT detail FROM events WHERE zone = ? AND kind = ? AND start_ts = ?", key
        ).fetchone()
        if stored is None:
            self.conn.execute(
                "INSERT INTO events (zone, kind, start_ts, end_ts, detail) VALUES (?,?,?,?,?)",
                (*key, end_ts, json.dumps(detail, separators=(",", ":"))),
            )
        else:
            merged = json.dumps(merge_patch(json.loads(stored[0]), detail), separators=(",", ":"))
            self.conn.execute(
                "UPDATE events SET end_ts = ?, detail = ? WHERE zone = ? AND kind = ? AND start_ts = ?",
                (end_ts, merged, *key),
            )
        row = self.conn.execute(
            "SELECT id, end_ts, detail FROM events WHERE zone = ? AND kind = ? AND start_ts = ?", (zone, kind, start_ts)
        ).fetchone()
        EVENT_LOG_INSERT.run(self.conn, (row[0], "set", zone, kind, start_ts, row[1], row[2]))

    def of_zone(self, zone: str, since_ts: float, until_ts: float | None = None) -> list[dict]:
        """Events of a zone that end after since_ts (or are still open) and start before until_ts.
        The ended and the open are asked for apart, so each half is a range of events_end."""
        until = "" if until_ts is None else " AND start_ts < :until"
        rows = self.conn.execute(
            f"{EVENT_COLUMNS} WHERE zone = :zone AND end_ts >= :since{until} UNION ALL "
            f"{EVENT_COLUMNS} WHERE zone = :zone AND end_ts IS NULL{until} ORDER BY start_ts, id",
            {"zone": zone, "since": since_ts, "until": until_ts},
        )
        return [{"id": r[0], "kind": r[1], "start_ts": r[2], "end_ts": r[3], **json.loads(r[4])} for r in rows]

    def delete(self, event_id: int) -> None:
        row = self.conn.execute(
            "SELECT zone, kind, start_ts, end_ts, detail FROM events WHERE id = ?", (event_id,)
        ).fetchone()
        if row is not None:
            EVENT_LOG_INSERT.run(self.conn, (event_id, "delete", *row))
        self.conn.execute("DELETE FROM events WHERE id = ?", (event_id,))


def merge_patch(target, patch):
    """RFC 7396 JSON merge patch (as SQLite's json_patch, which this replaces so both engines
    store the same text): objects merge key by key, a null removes a key, anything else
    replaces."""
    if not isinstance(patch, dict):
        return patch
    out = dict(target) if isinstance(target, dict) else {}
    for key, value in patch.items():
        if value is None:
            out.pop(key, None)
        else:
            out[key] = merge_patch(out.get(key), value)
    return out


def log_step(conn, alert_id: int, step: str, at_ts: float, wall_ts: float, value=None, by=None, note=None) -> None:
    """One chained row of an alert's log (the outbox adds `sent` steps through this too)."""
    ALERT_LOG_INSERT.run(conn, (alert_id, step, at_ts, wall_ts, value, by, note))
