"""Raw readings on PostgreSQL kept in monthly partitions of `reading_rows`, by reading time (UTC
calendar months), so retention drops a month of a whole fleet's readings at once instead of
deleting them row by row (what a DELETE of a month of forty sites, hundreds of millions of rows,
would cost in time, WAL and vacuum).

A partition is made when the first reading of its month is written. Retention itself is
unchanged (store/readings.py `fold`: the hourly aggregates, the chain's links across the cut,
the chained fold record, all computed from the rows before they go); what changes is how the
rows go. Inside a retention pass (`Pass`), a zone's rows in months wholly before its cut-off
are left for the end of the pass; there, in the same transaction, a month whose every row has
been folded by this pass is dropped, and a month that still holds rows nobody folded (a zone
no longer configured, whose readings retention never touches) has only the folded zones' rows
deleted. SQLite has no partitions: there the rows are deleted as they are folded.
"""

from __future__ import annotations

import datetime as dt

PARENT = "reading_rows"


def month_of(ts: float) -> tuple[int, int]:
    d = dt.datetime.fromtimestamp(ts, dt.UTC)
    return d.year, d.month


def bounds(year: int, month: int) -> tuple[float, float]:
    """[start, end) of a calendar month in epoch seconds."""
    start = dt.datetime(year, month, 1, tzinfo=dt.UTC)
    end = dt.datetime(year + (month == 12), month % 12 + 1, 1, tzinfo=dt.UTC)
    return start.timestamp(), end.timestamp()


def name(year: int, month: int) -> str:
    return f"{PARENT}_p{year:04d}{month:02d}"


class Months:
    """The partitions this connection knows exist; makes the missing ones (under a lock, as
    several central watchers may write the same month)."""

    def __init__(self):
        self.known: set[tuple[int, int]] = set()

    def ensure(self, conn, times) -> None:
        wanted = {month_of(t) for t in times} - self.known
        if not wanted:
            return
        conn.lock("partitions")
        for year, month in sorted(wanted):
            lo, hi = bounds(year, month)
            conn.execute(
                f"CREATE TABLE IF NOT EXISTS {name(year, month)} PARTITION OF {PARENT} FOR VALUES FROM ({lo!r}) TO ({hi!r})"
            )
        self.known |= wanted

    def forget(self) -> None:
        self.known.clear()


def listed(conn) -> list[tuple[str, float, float]]:
    """(name, start, end) of every partition, oldest first."""
    rows = conn.execute(
        "SELECT c.relname FROM pg_inherits i JOIN pg_class c ON c.oid = i.inhrelid "
        "JOIN pg_class p ON p.oid = i.inhparent WHERE p.relname = ?",
        (PARENT,),
    ).fetchall()
    out = []
    for (relname,) in rows:
        stamp = relname.rsplit("_p", 1)[1]
        out.append((relname, *bounds(int(stamp[:4]), int(stamp[4:]))))
    return sorted(out, key=lambda r: r[1])


def split(cut_ts: float) -> float:
    """Rows of a zone at or before its cut-off and before this time lie in months wholly
    before the cut-off: a retention pass leaves them for the end of the pass."""
    return bounds(*month_of(cut_ts))[0]


class Pass:
    """One retention pass on PostgreSQL: the zones folded (their series and where their deferred
    rows end), then, at its end, the months dropped or thinned."""

    def __init__(self):
        self.deferred: dict[int, float] = {}  # series -> rows before this time are folded, not yet deleted

    def defer(self, series: list[int], before_ts: float) -> None:
        for s in series:
            self.deferred[s] = max(before_ts, self.deferred.get(s, before_ts))

    def settle(self, conn) -> list[str]:
        """Drop each month whose rows this pass has all folded; from a month that also holds
        rows nobody folded, delete the folded rows only. The months dropped."""
        dropped = []
        for relname, _start, end in listed(conn):
            covered = [s for s, before in self.deferred.items() if before >= end]
            if not covered:
                continue
            marks = ", ".join("?" * len(covered))
            unfolded = conn.execute(
                f"SELECT 1 FROM {relname} WHERE series NOT IN ({marks}) LIMIT 1", tuple(covered)
            ).fetchone()
            if unfolded is None:
                conn.execute(f"DROP TABLE {relname}")
                dropped.append(relname)
            else:
                conn.execute(f"DELETE FROM {relname} WHERE series IN ({marks})", tuple(covered))
        self.deferred.clear()
        return dropped
