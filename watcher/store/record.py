"""The record as a whole: how many messages it has dealt with, the chain heads a summary pins,
and `verify` (every chain, the fold passes, lengths, and the checks between tables)."""

from __future__ import annotations

import time

from watcher.store import chain, crosscheck, marks
from watcher.store.repo import Repo

COUNTED_TABLES = frozenset(
    {
        "readings",
        "readings_hourly",
        "rejections",
        "held",
        "gaps",
        "events",
        "alerts",
        "alert_log",
        "outbox",
        "lots",
        "lot_events",
        "lot_state",
        "zone_state",
        "zone_snapshots",
        "daily_growth",
        "reports",
        "chain_folds",
    }
)


class Record(Repo):
    def messages_handled(self) -> int:
        """Messages the service has dealt with: readings, rejected (a row may stand for n), held,
        lot events."""
        return self.conn.execute(
            "SELECT (SELECT count(*) FROM reading_rows) + (SELECT coalesce(sum(n), 0) FROM rejections) "
            "+ (SELECT count(*) FROM held) + (SELECT count(*) FROM lot_events)"
        ).fetchone()[0]

    def count(self, table: str) -> int:
        """Rows in one of the record's tables (a name outside the schema is refused)."""
        if table not in COUNTED_TABLES:
            raise ValueError(f"no table {table!r} to count")
        return self.conn.execute(f"SELECT count(*) FROM {table}").fetchone()[0]

    def heads(self) -> dict[str, list]:
        """Each chain's [last row, its hash, rows] (a summary pins these)."""
        return chain.heads(self.conn)

    def verify(self, since_ts: float | None = None) -> tuple[list[chain.Finding], dict[str, int]]:
        """Everything `watcher verify` checks: the findings, and rows checked per chain. It reads
        one snapshot of the record; `self.verified` holds the chains' heads in it (what a mark
        of this verification records), `self.since_mark` the mark a --since walk starts after."""
        begun = not self.conn.in_transaction
        if begun:
            self.conn.execute("BEGIN")
        try:
            self.verified = chain.heads(self.conn)
            self.since_mark = marks.newest(self.conn) if since_ts is not None else None  # the one chain.verify reads
            have: dict[str, int] = {}
            findings, counts = chain.verify(self.conn, since_ts, have=have)
            findings += chain.check_reports(self.conn, exact=since_ts is None, have=have) + chain.check_lots(self.conn)
            findings += crosscheck.check_alerts(self.conn) + crosscheck.check_outbox(self.conn)
        finally:
            if begun:
                self.conn.execute("COMMIT")
        return findings, counts

    def mark(self, heads: dict[str, list], since_ts: float | None, wall_ts: float | None = None) -> None:
        """Record an intact verification of the chains up to these heads."""
        marks.add(self.conn, heads, since_ts, time.time() if wall_ts is None else wall_ts)
