"""Hash chains over the record: readings (one chain per zone), the alert log, the event log and
the lot events (whose arrive rows carry the lot's product and declared starting state).

Each row carries `chain` = SHA-256 of the previous row's chain and the row's own fields, in
insertion order. The hash is computed inside SQLite (a registered function, `chain_hash`), in
the same statement that inserts the row, so the writer and the deliverer, on two connections,
extend one chain correctly. Altering, inserting or deleting a stored row breaks the chain at
that row or the next; `verify` walks the chains and names the first row that no longer matches.
Retention deletes old raw readings: before it does, the link each surviving row had to a
deleted predecessor is kept in `chain_folds`, so the chain still verifies across the cut.
The weekly report prints each chain's head (row id and hash) and keeps it in `reports`, so a
printed report anchors the record: rewriting history after it would change a printed head.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterator
from dataclasses import dataclass

READING_FIELDS = ("zone", "sensor", "signal", "ts", "value", "received_ts", "topic", "late")
ALERT_LOG_FIELDS = ("alert_id", "step", "at_s", "wall_s", "value", "by", "note")
EVENT_LOG_FIELDS = ("event_id", "op", "zone", "kind", "start_ts", "end_ts", "detail")
LOT_EVENT_FIELDS = ("lot", "kind", "zone", "ts", "source", "sender", "received_s", "note", "detail")
LOGS = (("alert_log", ALERT_LOG_FIELDS, "wall_s"), ("event_log", EVENT_LOG_FIELDS, None))
LOGS += (("lot_events", LOT_EVENT_FIELDS, "received_s"),)


def chain_hash(prev, *fields) -> str:
    """SHA-256 over the previous hash and the fields' exact text (repr keeps every float bit).

    A float is hashed as SQLite stores it: SQLite keeps -0.0 as 0.0, so hashing repr(-0.0) at
    insert broke the chain the moment verify read the row back (an alert cleared with a cost of
    -0.0 did it); adding 0.0 turns -0.0 into 0.0 and leaves every other value as it is."""
    text = "".join("\x1f" + repr(f + 0.0 if isinstance(f, float) else f) for f in fields)
    return hashlib.sha256(((prev or "") + text).encode()).hexdigest()


def register(conn) -> None:
    conn.create_function("chain_hash", -1, chain_hash, deterministic=True)


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


@dataclass(frozen=True)
class Finding:
    chain: str  # "readings/<zone>", "alert_log", "event_log", "lot_events" or "lots"
    row_id: int
    what: str


def _walk(conn, chain: str, sql: str, args: tuple, fields: int, folds: dict, start_prev) -> Iterator[Finding | int]:
    """Recompute one chain; yield findings, then the number of rows checked."""
    prev = start_prev
    n = 0
    for row in conn.execute(sql, args):
        row_id, stored, values = row[0], row[1], row[2 : 2 + fields]
        n += 1
        if stored is None:  # written before chaining began (an older database)
            continue
        candidates = [prev] + folds.get(row_id, [])
        if not any(chain_hash(p, *values) == stored for p in candidates):
            yield Finding(
                chain, row_id, "stored chain differs: this row or the one before it was altered, added or removed"
            )
            return
        prev = stored
    yield n


def verify(conn, since_ts: float | None = None) -> tuple[list[Finding], dict[str, int]]:
    """Walk every chain; return the first break of each chain and rows checked per chain.

    With since_ts, each chain starts at its first row at or after that time, trusting the
    stored hash of the row before it.
    """
    findings: list[Finding] = []
    counts: dict[str, int] = {}
    folds: dict[str, dict[int, list[str]]] = {}
    for tbl, zone, next_id, prev in conn.execute("SELECT tbl, zone, next_id, prev_chain FROM chain_folds"):
        folds.setdefault(f"{tbl}/{zone}", {}).setdefault(next_id, []).append(prev)
    zones = [r[0] for r in conn.execute("SELECT DISTINCT zone FROM readings ORDER BY zone")]
    plans = []
    for zone in zones:
        first = 0
        if since_ts is not None:
            row = conn.execute("SELECT min(id) FROM readings WHERE zone = ? AND ts >= ?", (zone, since_ts)).fetchone()
            first = row[0] if row[0] is not None else 1 << 62
        plans.append(
            (
                f"readings/{zone}",
                "readings",
                f"SELECT id, chain, {', '.join(READING_FIELDS)} FROM readings WHERE zone = ? AND id >= ? ORDER BY id",
                (zone, first),
                len(READING_FIELDS),
                folds.get(f"readings/{zone}", {}),
                "zone = ? AND",
                (zone,),
                first,
            )
        )
    for name, fields, time_col in LOGS:
        first = 0
        if since_ts is not None and time_col:
            row = conn.execute(f"SELECT min(id) FROM {name} WHERE {time_col} >= ?", (since_ts,)).fetchone()
            first = row[0] if row[0] is not None else 1 << 62
        plans.append(
            (
                name,
                name,
                f"SELECT id, chain, {', '.join(fields)} FROM {name} WHERE id >= ? ORDER BY id",
                (first,),
                len(fields),
                {},
                "",
                (),
                first,
            )
        )
    for chain, table, sql, args, nfields, chain_folds, scope, scope_args, first in plans:
        prev = conn.execute(
            f"SELECT chain FROM {table} WHERE {scope} id < ? ORDER BY id DESC LIMIT 1", (*scope_args, first)
        ).fetchone()
        for item in _walk(conn, chain, sql, args, nfields, chain_folds, prev[0] if prev else None):
            if isinstance(item, Finding):
                findings.append(item)
            else:
                counts[chain] = item
    return findings, counts


def heads(conn) -> dict[str, list]:
    """Each chain's newest row: {chain name: [row id, hash]}."""
    out = {}
    for zone, row_id, chain in conn.execute(
        "SELECT zone, id, chain FROM readings WHERE id IN (SELECT max(id) FROM readings GROUP BY zone) ORDER BY zone"
    ):
        out[f"readings/{zone}"] = [row_id, chain]
    for table, _, _ in LOGS:
        row = conn.execute(f"SELECT id, chain FROM {table} ORDER BY id DESC LIMIT 1").fetchone()
        if row:
            out[table] = [row[0], row[1]]
    return out


def digest(head_map: dict[str, list]) -> str:
    text = ";".join(f"{k}={v[0]}:{v[1]}" for k, v in sorted(head_map.items()))
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


def check_reports(conn) -> list[Finding]:
    """Each stored report's printed heads must still be the chain values at those rows."""
    out = []
    for site, week, heads_json in conn.execute("SELECT site, week, heads FROM reports ORDER BY generated_s"):
        for name, (row_id, value) in json.loads(heads_json).items():
            table = name.split("/")[0]
            row = conn.execute(f"SELECT chain FROM {table} WHERE id = ?", (row_id,)).fetchone()
            if row is not None and row[0] != value:
                out.append(Finding(name, row_id, f"differs from the head printed in the {site} report for {week}"))
    return out
