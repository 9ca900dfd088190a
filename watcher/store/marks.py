"""Verification marks: each intact `verify` records what it proved, every chain's position
(row, hash, length) at the moment it read the record, in a chain of its own.

`verify --since` then hashes only what came after the newest mark (and what came after its
date, if that is later), starting each chain from the hash the mark recorded, and checks that
every marked row still holds that hash: a rewrite of older rows and of the hashes after them
shows there. What a mark cannot show is a row before it altered with its hash left as it was;
a full `verify` (no --since) re-hashes everything and finds that.
"""

from __future__ import annotations

import json

from watcher.store.hashing import Finding, chain_hash
from watcher.store.repo import hold

MARK_FIELDS = ("wall_ts", "since_ts", "heads")


def newest(conn) -> dict | None:
    """The newest mark: {"id", "wall_ts", "since_ts", "heads": {chain: [row, hash, rows]}}."""
    row = conn.execute("SELECT id, wall_ts, since_ts, heads FROM verify_marks ORDER BY id DESC LIMIT 1").fetchone()
    if row is None:
        return None
    return {"id": row[0], "wall_ts": row[1], "since_ts": row[2], "heads": json.loads(row[3])}


def add(conn, heads: dict[str, list], since_ts: float | None, wall_ts: float) -> None:
    """Record one intact verification (heads: what chain.heads gave before the walk)."""
    hold(conn, "chain:verify_marks")
    row = conn.execute("SELECT chain FROM verify_marks ORDER BY id DESC LIMIT 1").fetchone()
    values = (wall_ts, since_ts, json.dumps(heads, sort_keys=True))
    conn.execute(
        "INSERT INTO verify_marks (wall_ts, since_ts, heads, chain) VALUES (?, ?, ?, ?)",
        (*values, chain_hash(row[0] if row else None, *values)),
    )


def check_positions(conn, mark: dict | None) -> list[Finding]:
    """Every row the mark names must still hold the hash it recorded (a row since removed is
    the lengths' business)."""
    if mark is None:
        return []
    out = []
    for name, (row_id, value, _rows) in sorted(mark["heads"].items()):
        table = name.split("/")[0]
        id_col = "rowid" if table == "chain_folds" else "id"
        row = conn.execute(f"SELECT chain FROM {table} WHERE {id_col} = ?", (row_id,)).fetchone()
        if row is not None and row[0] != value:
            out.append(
                Finding(
                    name,
                    row_id,
                    f"differs from the hash verification mark {mark['id']} recorded: it or rows before it were "
                    "rewritten since",
                )
            )
    return out


def start_after(mark: dict | None, name: str, first: int) -> int:
    """Where a `--since` walk of one chain begins: its first row since the date, or the row
    after the mark's, whichever is later."""
    if mark is None or name not in mark["heads"]:
        return first
    return max(first, mark["heads"][name][0] + 1)
