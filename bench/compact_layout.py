"""The compact readings layout, measured on a copy of a real-size record before it is built.

Copies the first --rows readings of a record (one `bench/year.py` grew) into the candidate
layout: the names (zone, sensor, signal; topic) interned in two small tables, each reading as
integers and floats, one unique index (series, ts), and the hash kept on one row in ten as a
32-byte blob (each zone's last row of a live one-minute batch of its ten sensors; the chain
itself unchanged). Prints the bytes a reading of each table and index and of the file, then
walks the copy as verify would (every zone's chain in row order, compared where a hash is
kept) and prints the time a row on one core, the rows compared and the mismatches (0: the
same chain verifies across the change of layout).

Usage: python bench/compact_layout.py --source FOLDER/year.db [--rows 8064000] [--out FILE]
"""

from __future__ import annotations

import argparse
import hashlib
import os
import sqlite3
import time
from pathlib import Path

LAYOUT = """
CREATE TABLE series (id INTEGER PRIMARY KEY, zone TEXT NOT NULL, sensor TEXT NOT NULL, signal TEXT NOT NULL,
  UNIQUE (zone, sensor, signal));
CREATE TABLE topics (id INTEGER PRIMARY KEY, topic TEXT NOT NULL UNIQUE);
CREATE TABLE reading_rows (id INTEGER PRIMARY KEY, series INTEGER NOT NULL, ts REAL NOT NULL, value REAL NOT NULL,
  received_ts REAL NOT NULL, topic INTEGER NOT NULL, late INTEGER NOT NULL DEFAULT 0, chain BLOB);
CREATE UNIQUE INDEX reading_rows_key ON reading_rows (series, ts);
"""


def build(source: Path, out: Path, rows: int) -> None:
    """The copy, inserted in row order into the indexed table (as live writing fills it)."""
    for p in (out, Path(f"{out}-wal"), Path(f"{out}-shm")):
        p.unlink(missing_ok=True)
    c = sqlite3.connect(out, isolation_level=None)
    c.create_function("unhex", 1, lambda h: bytes.fromhex(h) if h else None, deterministic=True)
    c.execute("PRAGMA synchronous = OFF")
    c.execute(f"ATTACH '{source.resolve().as_uri()}?mode=ro' AS src")
    c.executescript(LAYOUT)
    c.execute("BEGIN")
    c.execute(
        f"INSERT INTO series (zone, sensor, signal) SELECT DISTINCT zone, sensor, signal FROM src.readings WHERE id <= {rows}"
    )
    c.execute(f"INSERT INTO topics (topic) SELECT DISTINCT topic FROM src.readings WHERE id <= {rows}")
    c.execute(
        "INSERT INTO reading_rows SELECT r.id, s.id, r.ts, r.value, r.received_ts, t.id, r.late, "
        "CASE WHEN r.id % 10 = 0 THEN unhex(r.chain) END FROM src.readings r "
        "JOIN series s ON s.zone = r.zone AND s.sensor = r.sensor AND s.signal = r.signal "
        f"JOIN topics t ON t.topic = r.topic WHERE r.id <= {rows} ORDER BY r.id"
    )
    c.execute("COMMIT")
    c.execute("DETACH src")
    n = c.execute("SELECT count(*) FROM reading_rows").fetchone()[0]
    for name, size in c.execute("SELECT name, sum(pgsize) FROM dbstat GROUP BY name ORDER BY 2 DESC LIMIT 3"):
        print(f"{name:24s} {size / n:6.1f} bytes a reading")
    print(f"{'the file':24s} {os.path.getsize(out) / n:6.1f} bytes a reading ({n:,} readings)")
    c.close()


def walk(path: Path) -> None:
    """Every zone's chain in row order, compared where a hash is kept."""
    c = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro", uri=True)
    series = {i: (z, s, g) for i, z, s, g in c.execute("SELECT id, zone, sensor, signal FROM series")}
    topics = dict(c.execute("SELECT id, topic FROM topics"))
    texts: dict[tuple, tuple[str, str, str]] = {}
    floats: dict[float, str] = {}
    prevs: dict[str, str] = {}
    n = compared = bad = 0

    def text(x: float) -> str:
        if len(floats) > 65536:
            floats.clear()
        floats[x] = repr(x + 0.0)
        return floats[x]

    start = time.perf_counter()
    cur = c.execute("SELECT series, ts, value, received_ts, topic, late, chain FROM reading_rows ORDER BY id")
    while rows := cur.fetchmany(20000):
        for sid, ts, value, rts, tid, late, stored in rows:
            parts = texts.get((sid, tid, late))
            if parts is None:
                z, s, g = series[sid]
                parts = texts[(sid, tid, late)] = (
                    z,
                    f"\x1f{z!r}\x1f{s!r}\x1f{g!r}\x1f",
                    f"\x1f{topics[tid]!r}\x1f{late!r}",
                )
            zone, head, tail = parts
            f = floats.get
            line = f"{prevs.get(zone) or ''}{head}{f(ts) or text(ts)}\x1f{f(value) or text(value)}\x1f{f(rts) or text(rts)}{tail}"
            prevs[zone] = hashlib.sha256(line.encode()).hexdigest()
            n += 1
            if stored is not None:
                compared += 1
                bad += stored.hex() != prevs[zone]
    took = time.perf_counter() - start
    print(f"walk: {took / n * 1e6:.2f} µs a reading on one core; {compared:,} hashes compared, {bad} mismatches")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--source", required=True, help="a record bench/year.py grew (read only)")
    ap.add_argument("--rows", type=int, default=8_064_000, help="readings to copy (default: 4 weeks of 200 sensors)")
    ap.add_argument("--out", default=None, help="the copy (default: beside the source, compact.db)")
    a = ap.parse_args()
    source = Path(a.source)
    out = Path(a.out) if a.out else source.parent / "compact.db"
    build(source, out, a.rows)
    walk(out)
    out.unlink()


if __name__ == "__main__":
    main()
