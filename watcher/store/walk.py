"""Verify's walk over the readings: every zone's chain recomputed in one pass in row order.

The readings of all zones are interleaved on disk in the order they were written. Walking one
zone at a time through its index reads every page once per zone (twenty zones: twenty reads
of the table); one pass in row order reads each page once and carries each zone's chain in a
dict (store/hashing.py's ReadingHasher renders each row's constant text once).

A big record is cut into as many row ranges as there are cores, each walked in its own
process. A range after the first starts each zone from the stored hash of that zone's last
row before it; the range before checks that very row against what it recomputes, so the
pieces together prove what one pass would, and the first break of each zone is the earliest
range's.
"""

from __future__ import annotations

import multiprocessing
import os
import sqlite3
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

from watcher.store.hashing import READING_FIELDS, Finding, ReadingHasher, chain_hash

#: Rows above which the walk runs in worker processes, one per core; below it, starting
#: workers costs more than it saves.
PARALLEL_ROWS = 300_000
BATCH = 20_000
BROKEN = (
    "does not follow from the row before it: rows before it were deleted, or this row or the one before it was "
    "altered or added"
)


def walk_range(conn, lo: int, hi: int, starts: dict, folds: dict, hashed_from: float) -> dict[str, list]:
    """Recompute every zone's chain over rows lo <= id < hi, each zone starting from its hash
    in `starts` (None: the chain's first row). Returns {zone: [rows checked, first Finding or
    None]}; a zone's walk stops at its first break."""
    hasher = ReadingHasher()
    prevs = dict(starts)
    out: dict[str, list] = {}
    cols = ", ".join(READING_FIELDS)
    cur = conn.execute(f"SELECT id, chain, {cols} FROM readings WHERE id >= ? AND id < ? ORDER BY id", (lo, hi))
    while rows := cur.fetchmany(BATCH):
        for row_id, stored, zone, sensor, signal, ts, value, received_ts, topic, late in rows:
            got = out.get(zone)
            if got is None:
                got = out[zone] = [0, None]
            elif got[1] is not None:
                continue
            got[0] += 1
            if stored is None:
                if row_id >= hashed_from:
                    what = "no hash from this row on (its chain value was removed)"
                    got[1] = Finding(f"readings/{zone}", row_id, what, "MISSING")
                continue  # else written before this chain was hashed (an older database)
            if hasher(prevs.get(zone), zone, sensor, signal, ts, value, received_ts, topic, late) != stored:
                values = (zone, sensor, signal, ts, value, received_ts, topic, late)
                links = folds.get(f"readings/{zone}", {}).get(row_id, [])
                if not any(chain_hash(p, *values) == stored for p in links):
                    got[1] = Finding(f"readings/{zone}", row_id, BROKEN)
                    continue
            prevs[zone] = stored
    return out


def _starts_before(conn, zones: list[str], first_id: int) -> dict[str, str | None]:
    """Each zone's stored hash of its last row before first_id (an index seek a zone)."""
    out = {}
    for zone in zones:
        row = conn.execute(
            "SELECT chain FROM readings WHERE zone = ? AND id < ? ORDER BY id DESC LIMIT 1", (zone, first_id)
        ).fetchone()
        out[zone] = row[0] if row else None
    return out


def _in_worker(path: str, lo: int, hi: int, starts: dict, folds: dict, hashed_from: float) -> dict[str, list]:
    conn = sqlite3.connect(Path(path).resolve().as_uri() + "?mode=ro", uri=True)
    try:
        return walk_range(conn, lo, hi, starts, folds, hashed_from)
    finally:
        conn.close()


def walk_readings(conn, zones: list[str], first_id: int, folds: dict, hashed_from: float):
    """Every zone's chain from row first_id on: ({zone: rows checked} of the zones that hold,
    [first break of each zone that does not]). In worker processes when the record is big and
    there is more than one core."""
    last = conn.execute("SELECT max(id) FROM readings").fetchone()[0] or 0
    path = conn.execute("PRAGMA database_list").fetchone()[2]
    workers = os.cpu_count() or 1
    if not path or workers < 2 or last - first_id < PARALLEL_ROWS:
        parts = [walk_range(conn, first_id, last + 1, _starts_before(conn, zones, first_id), folds, hashed_from)]
    else:
        step = (last + 1 - first_id) // workers + 1
        bounds = [(first_id + k * step, min(first_id + (k + 1) * step, last + 1)) for k in range(workers)]
        ctx = multiprocessing.get_context("spawn")  # never fork a process holding SQLite connections
        with ProcessPoolExecutor(max_workers=workers, mp_context=ctx) as pool:
            futures = [
                pool.submit(_in_worker, path, lo, hi, _starts_before(conn, zones, lo), folds, hashed_from)
                for lo, hi in bounds
            ]
            parts = [f.result() for f in futures]
    counts: dict[str, int] = {}
    breaks: dict[str, Finding] = {}
    for part in parts:  # in row order: a zone's first break is the earliest range's
        for zone, (n, found) in part.items():
            counts[zone] = counts.get(zone, 0) + n
            if found is not None and zone not in breaks:
                breaks[zone] = found
    return {z: n for z, n in counts.items() if z not in breaks}, [breaks[z] for z in sorted(breaks)]
