"""Hash chains over the record: readings (one chain per zone), the alert log, the event log, the
lot events (whose arrive rows carry the lot's product and declared starting state), the
rejections, and the fold record that retention leaves.

Each row carries `chain` = SHA-256 of the previous row's chain and the row's own fields, in
insertion order. The hash is computed inside SQLite (a registered function, `chain_hash`), in
the same statement that inserts the row, so the writer and the deliverer, on two connections,
extend one chain correctly. Altering, inserting or deleting a stored row breaks the chain at
that row or the next; `verify` walks the chains and names the first row that no longer matches.

Retention deletes old raw readings and rejections. Each pass is itself recorded, chained, in
`chain_folds`: one pass row (cut-off, rows deleted, when) and one link per surviving row whose
predecessor was deleted, so the chain still verifies across the cut. A fold is only accepted
when it hashes into the fold chain, cuts at least the shortest retention before the time it was
made, and its counts agree with the hourly aggregates; a hand-made fold over a hole is named.

A chain cannot show rows cut from its end, so lengths are checked too: each chain's length
(rows plus rows folded) is printed with its head in every weekly summary, and the last
checkpoint's count of each zone's readings must still be there. `store/crosscheck.py` holds the
checks between tables (alerts against their log, notifications sent against it).
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import math
import time

from watcher.store import marks, walk
from watcher.store.hashing import READING_FIELDS, Finding, chain_hash, register
from watcher.store.repo import hold, is_pg, stream

__all__ = ["READING_FIELDS", "Finding", "chain_hash", "register"]

ALERT_LOG_FIELDS = ("alert_id", "step", "at_ts", "wall_ts", "value", "by", "note")
EVENT_LOG_FIELDS = ("event_id", "op", "zone", "kind", "start_ts", "end_ts", "detail")
LOT_EVENT_FIELDS = ("lot", "kind", "zone", "ts", "source", "sender", "received_ts", "note", "detail")
REJECTION_FIELDS = ("received_ts", "topic", "reason", "payload", "n")
FOLD_FIELDS = ("tbl", "zone", "next_id", "prev_chain", "cutoff_ts", "folded", "wall_ts")
LOGS = (("alert_log", ALERT_LOG_FIELDS, "wall_ts"), ("event_log", EVENT_LOG_FIELDS, None))
LOGS += (("lot_events", LOT_EVENT_FIELDS, "received_ts"), ("rejections", REJECTION_FIELDS, "received_ts"))
LOGS += (("verify_marks", marks.MARK_FIELDS, "wall_ts"),)
CHAINED_TABLES = tuple((name, "id") for name in ("readings", *(t for t, _, _ in LOGS))) + (("chain_folds", "rowid"),)
MIN_RETENTION_S = 366 * 86400.0  # storage.raw_retention_days cannot be set lower
CLOCK_SLACK_S = 86400.0


def _prev_sql(table: str, zone_scoped: bool) -> str:
    where = " WHERE zone = ?" if zone_scoped else ""
    return f"(SELECT chain FROM {table}{where} ORDER BY id DESC LIMIT 1)"


def insert_sql(table: str, fields: tuple[str, ...], zone_scoped: bool, verb: str = "INSERT") -> str:
    """An INSERT that fills `chain` from the table's last row; parameters: the fields, then
    (zone,) if zone_scoped, then the fields again."""
    marks = ", ".join("?" * len(fields))
    return (
        f"{verb} INTO {table} ({', '.join(fields)}, chain) VALUES ({marks}, "
        f"chain_hash({_prev_sql(table, zone_scoped)}, {marks}))"
    )


def params(values: tuple, zone: str | None = None) -> tuple:
    return (*values, zone, *values) if zone is not None else (*values, *values)


class Append:
    """Adds a row to one of the logs' chains (every writer's rows, one chain per log).

    On SQLite the hash is made inside the INSERT (`chain_hash`, registered on the connection),
    so two connections extending one log (the writer, the deliverer) always chain onto the row
    that is last when theirs goes in. PostgreSQL cannot call back into Python: there the log is
    locked until the transaction ends (several central watchers may append to it), its last
    hash read, the row's hashed here and inserted: the same hash, made by the same function."""

    def __init__(self, table: str, fields: tuple[str, ...]):
        self.table = table
        self.sql = insert_sql(table, fields, zone_scoped=False)
        self.plain = f"INSERT INTO {table} ({', '.join(fields)}, chain) VALUES ({', '.join('?' * (len(fields) + 1))})"

    def run(self, conn, values: tuple):
        """Insert the row; the cursor (its lastrowid is the row's id)."""
        if not is_pg(conn):
            return conn.execute(self.sql, params(values))
        hold(conn, f"chain:{self.table}")
        row = conn.execute(f"SELECT chain FROM {self.table} ORDER BY id DESC LIMIT 1").fetchone()
        return conn.execute(self.plain, (*values, chain_hash(row[0] if row else None, *values)))


def add_fold(
    conn, table: str, zone: str, links, folded: int, cutoff_ts: float, wall_ts: float | None, fields=FOLD_FIELDS
) -> None:
    """Record one retention pass (and its links) in the chained fold record (fields: the
    columns' names, which an old migration gives as they were then)."""
    hold(conn, "chain:chain_folds")
    row = conn.execute("SELECT chain FROM chain_folds ORDER BY rowid DESC LIMIT 1").fetchone()
    prev = row[0] if row else None
    rows = [(table, zone, 0, None, cutoff_ts, folded, wall_ts)]
    rows += [(table, zone, next_id, prev_chain, cutoff_ts, 0, wall_ts) for next_id, prev_chain in links]
    for values in rows:
        prev = chain_hash(prev, *values)
        conn.execute(
            f"INSERT INTO chain_folds ({', '.join(fields)}, chain) VALUES ({', '.join('?' * 8)})", (*values, prev)
        )


def _meta(conn) -> dict[str, float]:
    return dict(conn.execute("SELECT key, value FROM record_meta"))


def reading_zones(conn) -> list[str]:
    """The zones that have readings (an index seek a series), whatever the history."""
    sql = (
        "SELECT DISTINCT zone FROM series s WHERE EXISTS (SELECT 1 FROM reading_rows WHERE series = s.id) ORDER BY zone"
    )
    return [z for (z,) in conn.execute(sql)]


def _first_id(conn, table: str, time_col: str, since_ts: float | None, scope: str = "", args: tuple = ()) -> int:
    """The first row at or after since_ts (0: every row; past the end: none)."""
    if since_ts is None:
        return 0
    row = conn.execute(f"SELECT min(id) FROM {table} WHERE {scope}{time_col} >= ?", (*args, since_ts)).fetchone()
    return row[0] if row[0] is not None else 1 << 62


def _walk_log(conn, name: str, fields: tuple[str, ...], first: int, folds: dict, hashed_from: float):
    """Recompute one log's chain from row `first`: (its first break or None, rows checked)."""
    prev = conn.execute(f"SELECT chain FROM {name} WHERE id < ? ORDER BY id DESC LIMIT 1", (first,)).fetchone()
    prev = prev[0] if prev else None
    n = 0
    sql = f"SELECT id, chain, {', '.join(fields)} FROM {name} WHERE id >= ? ORDER BY id"
    for row_id, stored, *values in stream(conn, sql, (first,)):
        n += 1
        if stored is None:
            if row_id < hashed_from:  # written before this chain was hashed (an older database)
                continue
            return Finding(name, row_id, "no hash from this row on (its chain value was removed)", "MISSING"), n
        if not any(chain_hash(p, *values) == stored for p in [prev] + folds.get(row_id, [])):
            return Finding(name, row_id, walk.BROKEN), n
        prev = stored
    return None, n


def verify(
    conn, since_ts: float | None = None, now_ts: float | None = None, have: dict | None = None
) -> tuple[list[Finding], dict[str, int]]:
    """Walk every chain, then check what chains cannot show (folds, lengths, missing zones).

    Returns the findings (the first break of each chain, then every missing part) and rows
    checked per chain. With since_ts, each chain starts at its first row at or after that
    time, or after the newest verification mark's row if that is later (store/marks.py),
    trusting the stored hash of the row before it; the rows the mark names must still hold
    the hashes it recorded. `have`, if given, receives the rows each chain has ever held (what
    check_reports compares with the lengths a summary printed).
    """
    meta = _meta(conn)
    findings: list[Finding] = []
    counts: dict[str, int] = {}
    for table, _ in CHAINED_TABLES:
        if f"chained_from:{table}" not in meta:
            findings.append(Finding(table, 0, "the record of where its hashing began (record_meta) is gone", "MISSING"))
    fold_rows, fold_break = _fold_rows(conn, meta)
    folds = _links(fold_rows)
    mark = marks.newest(conn)
    since_mark = mark if since_ts is not None else None
    zones = reading_zones(conn)
    firsts = {}
    for zone in zones:
        since_first = _first_id(conn, "readings", "ts", since_ts, "zone = ? AND ", (zone,))
        start = marks.start_after(since_mark, f"readings/{zone}", since_first)
        last = walk.head_row(conn, zone)
        if last is not None and last[0] >= start:
            firsts[zone] = start  # a zone with nothing to walk does not hold the walk's start back
    hashed_from = meta.get("chained_from:readings", 0.0)
    walked, breaks = walk.walk_readings(conn, firsts, folds, hashed_from)
    findings += breaks
    broken = {f.chain for f in breaks}
    counts.update({f"readings/{z}": walked.get(z, 0) for z in zones if f"readings/{z}" not in broken})
    for name, fields, time_col in LOGS:
        start = marks.start_after(since_mark, name, _first_id(conn, name, time_col, since_ts) if time_col else 0)
        found, n = _walk_log(
            conn, name, fields, start, folds.get(f"{name}/", {}), meta.get(f"chained_from:{name}", 0.0)
        )
        if found is None:
            counts[name] = n
        else:
            findings.append(found)
    findings += marks.check_positions(conn, mark)
    counts["chain_folds"] = len(fold_rows)
    if fold_break is not None:
        findings.append(fold_break)
    findings += check_folds(conn, fold_rows, meta, now_ts)
    # A full walk has counted every row of each zone it found intact: no second pass to count.
    held = lengths(conn, fold_rows, exact=since_ts is None, counted=walked if since_ts is None else None)
    if have is not None:
        have.update(held)
    findings += check_lengths(conn, held)
    if since_ts is None:
        findings += check_counts(conn, held)
    return findings, counts


def _links(fold_rows: list[dict]) -> dict[str, dict[int, list[str]]]:
    """{chain: {row: [hashes of the deleted rows before it]}} from the fold record."""
    folds: dict[str, dict[int, list[str]]] = {}
    for r in fold_rows:
        if r["next_id"]:
            folds.setdefault(f"{r['tbl']}/{r['zone']}", {}).setdefault(r["next_id"], []).append(r["prev_chain"])
    return folds


def fold_links(conn) -> dict[str, dict[int, list[str]]]:
    """The fold record's links, as verify reads them (those that hash into the fold chain)."""
    return _links(_fold_rows(conn, _meta(conn))[0])


def _fold_rows(conn, meta) -> tuple[list[dict], Finding | None]:
    """The fold rows that hash into the fold chain (up to its first break), and that break."""
    rows, prev = [], None
    hashed_from = meta.get("chained_from:chain_folds", 0.0)
    for rowid, stored, *values in conn.execute(
        f"SELECT rowid, chain, {', '.join(FOLD_FIELDS)} FROM chain_folds ORDER BY rowid"
    ):
        doc = dict(zip(FOLD_FIELDS, values), rowid=rowid)
        if stored is None and rowid < hashed_from:
            rows.append(doc)  # a link kept before folds were chained
            continue
        if stored is None or chain_hash(prev, *values) != stored:
            what = "fold record not made by retention (no hash, or it does not follow): the rows it covers are unaccounted for"
            return rows, Finding("chain_folds", rowid, what)
        rows.append(doc)
        prev = stored
    return rows, None


def _passes(fold_rows: list[dict]) -> list[dict]:
    return [r for r in fold_rows if not r["next_id"] and r.get("cutoff_ts") is not None]


def check_folds(conn, fold_rows: list[dict], meta: dict, now_ts: float | None) -> list[Finding]:
    """A retention pass cuts at least the shortest retention before it ran, never runs in the
    future, and the readings it folded are in the hourly aggregates."""
    now_ts = time.time() if now_ts is None else now_ts
    out = []
    legacy_until = meta.get("legacy_folds_until", 0.0)
    for p in _passes(fold_rows):
        name = f"{p['tbl']}/{p['zone']}" if p["tbl"] == "readings" else p["tbl"]
        if p["wall_ts"] is None:
            if p["rowid"] > legacy_until:
                out.append(Finding("chain_folds", p["rowid"], f"{name}: a retention pass without its time"))
            continue
        if p["wall_ts"] > now_ts + CLOCK_SLACK_S:
            out.append(
                Finding(
                    "chain_folds", p["rowid"], f"{name}: a retention pass dated in the future ({_iso(p['wall_ts'])})"
                )
            )
        elif p["cutoff_ts"] > p["wall_ts"] - MIN_RETENTION_S + CLOCK_SLACK_S:
            days = (p["wall_ts"] - p["cutoff_ts"]) / 86400.0
            out.append(
                Finding(
                    "chain_folds",
                    p["rowid"],
                    f"{name}: {p['folded']} rows deleted up to {_iso(p['cutoff_ts'])}, only {days:.0f} days before the "
                    f"pass at {_iso(p['wall_ts'])}; retention keeps at least 366 days",
                    "MISSING",
                )
            )
    folded: dict[str, int] = {}
    for p in _passes(fold_rows):
        if p["tbl"] == "readings":
            folded[p["zone"]] = folded.get(p["zone"], 0) + int(p["folded"])
    hourly = dict(conn.execute("SELECT zone, sum(n) FROM readings_hourly GROUP BY zone"))
    for zone in sorted(set(folded) | set(hourly)):
        if folded.get(zone, 0) != hourly.get(zone, 0):
            out.append(
                Finding(
                    f"readings/{zone}",
                    0,
                    f"retention records {folded.get(zone, 0)} readings folded, the hourly aggregates hold "
                    f"{hourly.get(zone, 0)}",
                )
            )
    return out


def lengths(
    conn, fold_rows: list[dict] | None = None, exact: bool = True, counted: dict[str, int] | None = None
) -> dict[str, int]:
    """Rows each chain has ever held: rows stored plus rows retention folded away. exact
    counts the readings (a full verify: `counted` gives the zones whose every stored row its
    walk counted, the others are counted here); otherwise each zone's count kept as they were
    written is read (the weekly summary, `verify --since`): no scan of the history."""
    out: dict[str, int] = {}
    if exact:
        if fold_rows is None:
            fold_rows = _fold_rows(conn, _meta(conn))[0]
        counted = counted or {}
        for (zone,) in conn.execute("SELECT DISTINCT zone FROM series"):
            n = counted.get(zone)
            if n is None:
                n = conn.execute(
                    "SELECT count(*) FROM reading_rows WHERE series IN (SELECT id FROM series WHERE zone = ?)", (zone,)
                ).fetchone()[0]
            if n:
                out[f"readings/{zone}"] = n
        for p in _passes(fold_rows):
            if p["tbl"] == "readings":
                out[f"readings/{p['zone']}"] = out.get(f"readings/{p['zone']}", 0) + int(p["folded"])
    else:
        for zone, n in conn.execute("SELECT zone, rows FROM reading_counts"):
            out[f"readings/{zone}"] = n
    for table, _, _ in LOGS:
        out[table] = conn.execute(f"SELECT count(*) FROM {table}").fetchone()[0]
    for p in _passes(fold_rows if fold_rows is not None else _fold_rows(conn, _meta(conn))[0]):
        if p["tbl"] != "readings":
            out[p["tbl"]] = out.get(p["tbl"], 0) + int(p["folded"])
    return out


def check_counts(conn, exact: dict[str, int]) -> list[Finding]:
    """Each zone's readings counted as they were written must equal those stored or folded."""
    kept = lengths(conn, exact=False)
    out = []
    for name in sorted(set(exact) | set(kept)):
        if name.startswith("readings/") and exact.get(name, 0) != kept.get(name, 0):
            out.append(
                Finding(
                    name,
                    0,
                    f"{kept.get(name, 0)} readings counted as they were written, {exact.get(name, 0)} stored or folded",
                    "MISSING" if exact.get(name, 0) < kept.get(name, 0) else "MISMATCH",
                )
            )
    return out


def check_lengths(conn, have: dict[str, int]) -> list[Finding]:
    """Rows cut from a chain's end, or a whole zone gone, against the last checkpoint's counts."""
    out = []
    for zone, total, updated in conn.execute("SELECT zone, readings_total, updated_ts FROM zone_state ORDER BY zone"):
        now = have.get(f"readings/{zone}", 0)
        if now < total:
            what = "no readings left" if now == 0 else f"{total - now} readings missing"
            out.append(
                Finding(
                    f"readings/{zone}",
                    0,
                    f"{what}: the checkpoint of {_iso(updated)} counted {total}, the record holds {now}",
                    "MISSING",
                )
            )
    return out


def heads(conn) -> dict[str, list]:
    """Each chain's newest row and length: {chain name: [row id, hash, rows ever held]}; an
    index seek per zone and the counts kept as rows were written, whatever the history."""
    size = lengths(conn, exact=False)
    out = {}
    for zone in reading_zones(conn):
        row_id, chain = walk.head_row(conn, zone)
        out[f"readings/{zone}"] = [row_id, chain, size.get(f"readings/{zone}", 0)]
    for table, _, _ in LOGS:
        row = conn.execute(f"SELECT id, chain FROM {table} ORDER BY id DESC LIMIT 1").fetchone()
        if row:
            out[table] = [row[0], row[1], size[table]]
    row = conn.execute("SELECT rowid, chain FROM chain_folds ORDER BY rowid DESC LIMIT 1").fetchone()
    if row and row[1]:
        out["chain_folds"] = [row[0], row[1], conn.execute("SELECT count(*) FROM chain_folds").fetchone()[0]]
    return out


def digest(head_map: dict[str, list]) -> str:
    text = ";".join(f"{k}={':'.join(str(x) for x in v)}" for k, v in sorted(head_map.items()))
    return hashlib.sha256(text.encode()).hexdigest()


def check_lots(conn) -> list[Finding]:
    """Each lot's product and starting state must be what its chained arrive event declared."""
    out = []
    for lot, product, initial, detail, row_id, linked in conn.execute(
        "SELECT l.lot, l.product, l.initial, e.detail, e.id, e.chain FROM lots l LEFT JOIN lot_events e "
        "ON e.lot = l.lot AND e.kind = 'arrive'"
    ):
        if row_id is not None and linked is None:  # recorded before lot events were chained
            continue
        declared = json.loads(detail) if detail else None
        if declared != {"product": product, "initial": json.loads(initial)}:
            out.append(
                Finding("lots", row_id or 0, f"lot {lot}: product or starting state differs from its arrive event")
            )
    return out


def check_reports(conn, exact: bool = True, have: dict[str, int] | None = None) -> list[Finding]:
    """Each stored summary's printed heads must still be there with the same hash, and no chain
    may be shorter than the summary printed it (exact: counted, else as kept when written;
    have: those lengths, found already by verify)."""
    out = []
    have = lengths(conn, exact=exact) if have is None else have
    folded_after: dict[str, float] = {}
    for tbl, zone, wall_ts in conn.execute(
        "SELECT tbl, zone, max(wall_ts) FROM chain_folds WHERE next_id = 0 GROUP BY tbl, zone"
    ):
        folded_after[f"readings/{zone}" if tbl == "readings" else tbl] = wall_ts if wall_ts is not None else math.inf
    for site, week, generated_ts, heads_json in conn.execute(
        "SELECT site, week, generated_ts, heads FROM reports ORDER BY generated_ts"
    ):
        where = f"the {site} summary for {week}"
        for name, printed in json.loads(heads_json).items():
            row_id, value = printed[0], printed[1]
            table = name.split("/")[0]
            id_col = "rowid" if table == "chain_folds" else "id"
            row = conn.execute(f"SELECT chain FROM {table} WHERE {id_col} = ?", (row_id,)).fetchone()
            if row is None and folded_after.get(name, -math.inf) < generated_ts:
                out.append(Finding(name, row_id, f"this row, printed as the head in {where}, is gone", "MISSING"))
            elif row is not None and row[0] != value:
                out.append(Finding(name, row_id, f"differs from the head printed in {where}"))
            if len(printed) > 2 and have.get(name, 0) < printed[2]:
                missing = printed[2] - have.get(name, 0)
                out.append(
                    Finding(
                        name,
                        row_id,
                        f"{missing} row{'s' if missing != 1 else ''} fewer than {where} printed ({printed[2]})",
                        "MISSING",
                    )
                )
    return out


def _iso(ts: float) -> str:
    try:
        return dt.datetime.fromtimestamp(ts, dt.UTC).strftime("%Y-%m-%dT%H:%MZ")
    except (OverflowError, OSError, ValueError):
        return repr(ts)
