"""Outbox rows: one row per (notification, channel), so a retry reaches only the channel that
failed. A dedupe key (unique) makes enqueueing idempotent: whatever re-runs after a crash, the
same notification is stored once. A row is marked `sending` (committed) before the send; a row
found `sending` at start-up was cut off mid-send and goes out again, marked as a possible repeat.
"""

from __future__ import annotations

import json

from watcher.store.alerts import log_step
from watcher.store.repo import Repo


class Outbox(Repo):
    def add(
        self,
        title: str,
        body: str,
        tags: list[str],
        now_ts: float,
        channels: list[str | None] = (None,),
        dedupe: str | None = None,
        alert_id: int | None = None,
        attach: str | None = None,
        level: str = "info",
    ) -> int:
        """Store the message once per channel (None: no channel takes it, kept as `unrouted`).
        level: info, success, warning or failure (what the channel shows as its urgency).
        Returns the number of rows added (0 when the dedupe key was seen before)."""
        added = 0
        for ch in channels:
            key = None if dedupe is None else f"{dedupe}@{ch or '-'}"
            cur = self.conn.execute(
                "INSERT OR IGNORE INTO outbox (created_ts, tags, title, body, next_try_ts, channel, dedupe, alert_id, "
                "attach, status, level) VALUES (?,?,?,?,?,?,?,?,?,?,?)",
                (
                    now_ts,
                    json.dumps(sorted(tags)),
                    title,
                    body,
                    now_ts,
                    ch,
                    key,
                    alert_id,
                    attach,
                    "pending" if ch else "unrouted",
                    level,
                ),
            )
            added += cur.rowcount
        return added

    def due(self, now_ts: float, limit: int = 50) -> list[tuple]:
        """(id, channel, title, body, attempts, attach, maybe_repeat, level) of pending rows due now,
        oldest first."""
        return self.conn.execute(
            "SELECT id, channel, title, body, attempts, attach, maybe_repeat, level FROM outbox "
            "WHERE status = 'pending' AND next_try_ts <= ? ORDER BY id LIMIT ?",
            (now_ts, limit),
        ).fetchall()

    def mark_sending(self, row_id: int) -> None:
        self.conn.execute("UPDATE outbox SET status = 'sending' WHERE id = ?", (row_id,))

    def recover(self) -> int:
        """Rows cut off mid-send by a crash go out again, flagged as possible repeats."""
        return self.conn.execute(
            "UPDATE outbox SET status = 'pending', maybe_repeat = 1 WHERE status = 'sending'"
        ).rowcount

    def record(self, row_id: int, status: str, result: str, log: str, now_ts: float, next_try_ts: float) -> None:
        self.conn.execute(
            "UPDATE outbox SET status = ?, attempts = attempts + 1, last_result = ?, last_log = ?, next_try_ts = ?, "
            "sent_ts = CASE WHEN ? = 'sent' THEN ? ELSE sent_ts END, "
            "last_failure = CASE WHEN ? = 'sent' THEN last_failure ELSE ? END WHERE id = ?",
            (status, result, log, next_try_ts, status, now_ts, status, f"{result}: {log}", row_id),
        )
        if status == "sent":  # the alert's own record shows each channel it reached
            alert_id, channel = self.conn.execute(
                "SELECT alert_id, channel FROM outbox WHERE id = ?", (row_id,)
            ).fetchone()
            if alert_id is not None:
                log_step(self.conn, alert_id, "sent", now_ts, now_ts, note=channel)

    def failing_channels(self) -> dict[str, float]:
        """Channels with a message still pending after a failed attempt: name -> oldest created_ts."""
        rows = self.conn.execute(
            "SELECT channel, min(created_ts) FROM outbox WHERE status = 'pending' AND attempts > 0 "
            "AND channel IS NOT NULL GROUP BY channel"
        )
        return {r[0]: r[1] for r in rows}
