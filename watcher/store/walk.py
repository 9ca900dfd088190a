"""The readings' chains: where each zone's hash is kept, and verify's walk over them.

Each zone's readings form one chain (store/chain.py): a row's hash is SHA-256 of the hash of
the zone's row before it and the row's own fields. Since schema m016 the hash is kept (the
`chain` column) only on some rows: every KEEP_EVERY-th row of a zone, each zone's newest row,
and every row a stored summary or verification mark names. The rows between two kept hashes
are hashed as before and checked at the next one, so a change to any of them still shows; a
finding names the rows from the last hash that held to the one that does not.

The walk reads the readings of all zones in one pass in the order they were written (each
page once) and carries each zone's running hash in a dict. A big record is cut into row
ranges walked in worker processes, one per core: a range starts each zone from the zone's
last kept hash before it (the range before checks that very hash), so the pieces prove what
one pass would.
"""

from __future__ import annotations

import multiprocessing
import os
import sqlite3
from concurrent.futures import ProcessPoolExecutor
from hashlib import sha256
from pathlib import Path

from watcher.store.hashing import READING_FIELDS, Finding, ReadingHasher
from watcher.store.repo import file_path, stream

#: Rows above which the walk runs in worker processes, one per core; below it, starting
#: workers costs more than it saves.
PARALLEL_ROWS = 300_000
BROKEN = (
    "does not follow from the row before it: rows before it were deleted, or this row or the one before it was "
    "altered or added"
)


def zone_series(conn, zone: str) -> list[int]:
    return [sid for (sid,) in conn.execute("SELECT id FROM series WHERE zone = ?", (zone,))]


def kept_before(conn, zone: str, before_id: int) -> tuple[int, str | None]:
    """(row, hash) of the zone's last kept hash before before_id; (0, None) if none: a seek a
    series in the index of kept hashes."""
    row_id = conn.execute(KEPT_BEFORE, (before_id, zone)).fetchone()[0]
    if row_id is None:
        return 0, None
    return row_id, conn.execute("SELECT chain FROM reading_rows WHERE id = ?", (row_id,)).fetchone()[0]


#: The zone's last kept hash's row before a row: an index seek a series, in one statement (a
#: statement a series costs a round trip each on a server).
KEPT_BEFORE = (
    "SELECT max((SELECT id FROM reading_rows WHERE series = s.id AND id < ? AND chain IS NOT NULL "
    "ORDER BY id DESC LIMIT 1)) FROM series s WHERE s.zone = ?"
)


def head_row(conn, zone: str) -> tuple[int, str] | None:
    """(row, hash) of the zone's newest row, whose hash is always kept; None without rows."""
    row = kept_before(conn, zone, 1 << 62)
    return row if row[0] else None


def names(conn) -> tuple[dict[int, tuple[str, str, str]], dict[int, str]]:
    """{series id: (zone, sensor, signal)} and {topic id: topic}: a row's names."""
    series = {sid: (z, s, g) for sid, z, s, g in conn.execute("SELECT id, zone, sensor, signal FROM series")}
    return series, dict(conn.execute("SELECT id, topic FROM topics"))


def follow(hasher, prev, row_id: int, values: tuple, stored, links: dict) -> str:
    """A row's running hash: from the hash before it, or, when retention deleted the rows
    before it, from the hash its fold link recorded (the one that gives its kept hash)."""
    candidates = links.get(row_id)
    if candidates:
        for p in candidates:
            h = hasher(p, *values)
            if stored is None or h == stored:
                return h
        return hasher(candidates[-1], *values)
    return hasher(prev, *values)


class _Zone:
    """One zone's walk: where it starts, its running hash, what was found."""

    __slots__ = ("begin", "prev", "n", "finding", "last", "last_chain", "ok", "links")

    def __init__(self, begin: int, prev, links: dict):
        self.begin, self.prev, self.links = begin, prev, links
        self.n, self.finding, self.last, self.last_chain, self.ok = 0, None, 0, None, begin


def walk_range(conn, lo: int, hi: int, starts: dict, folds: dict, hashed_from: float) -> dict[str, list]:
    """Recompute every zone's chain over rows < hi, each zone from its (row, hash) in
    `starts` on (rows up to that row are skipped), counting the rows from lo on. Returns
    {zone: [rows checked, first Finding or None, newest row, whether its hash is kept, the
    last row whose kept hash held]} of the zones with rows in the range."""
    series, topics = names(conn)
    hasher = ReadingHasher()
    zones = {z: _Zone(s[0], s[1], folds.get(f"readings/{z}", {})) for z, s in starts.items()}
    first = min([z.begin + 1 for z in zones.values()] + [lo])
    cur = stream(
        conn,
        f"SELECT id, {PACKED}, ts, value, received_ts, chain FROM reading_rows WHERE id >= ? AND id < ? ORDER BY id",
        (first, hi),
    )
    # packed (series, topic, late) -> (the zone's walk or None, head text, tail text, the row's names)
    texts: dict[int, tuple] = {}

    def parts_of(row_id: int, key: int | None) -> tuple:
        sid, tid, late = unpacked(conn, row_id, key)
        zone, sensor, signal = series[sid]
        row_names = (zone, sensor, signal, topics[tid], late)
        return (zones.get(zone), *(hasher.parts(*row_names) or (None, None)), row_names)

    text, number = hasher.floats.get, hasher.float_text
    for row_id, key, ts, value, received_ts, stored in cur:  # row by row: faster than big fetches
        parts = texts.get(key)
        if parts is None:
            parts = parts_of(row_id, key)
            if key is not None:
                texts[key] = parts
        z, head, tail, row_names = parts
        if z is None or row_id <= z.begin or z.finding is not None:
            continue  # a zone not walked, a row before its start, or a zone already broken
        if row_id >= lo:
            z.n += 1
        z.last, z.last_chain = row_id, stored
        if row_id < hashed_from:
            continue  # written before this chain was hashed (an older database)
        if (
            head is not None
            and type(ts) is float
            and type(value) is float
            and type(received_ts) is float
            and (not z.links or row_id not in z.links)
        ):
            # ReadingHasher.numbers, inlined: this runs for every row of the record.
            h = sha256(
                f"{z.prev or ''}{head}{text(ts) or number(ts)}\x1f{text(value) or number(value)}"
                f"\x1f{text(received_ts) or number(received_ts)}{tail}".encode()
            ).hexdigest()
        else:
            zone, sensor, signal, topic, lt = row_names
            values = (zone, sensor, signal, ts, value, received_ts, topic, lt)
            h = follow(hasher, z.prev, row_id, values, stored, z.links)
        if stored is not None:
            if h != stored:
                z.finding = _broken(row_names[0], z.ok + 1, row_id)
                continue
            z.ok = row_id
        z.prev = h
    return {name: [z.n, z.finding, z.last, z.last_chain is not None, z.ok] for name, z in zones.items() if z.last}


#: A row's series, topic and flag as one integer (fewer objects a row for the walk to make);
#: NULL for a row whose values would not pack exactly (an altered row: read as stored).
PACKED = (
    "CASE WHEN late IN (0, 1) AND series BETWEEN 0 AND 4294967295 AND topic BETWEEN 0 AND 1073741823 "
    "THEN series | (topic << 32) | (late << 62) END"
)


def unpacked(conn, row_id: int, key: int | None) -> tuple:
    """(series, topic, late) of a row from its PACKED key, or as stored when it has none."""
    if key is None:
        return conn.execute("SELECT series, topic, late FROM reading_rows WHERE id = ?", (row_id,)).fetchone()
    return key & 0xFFFFFFFF, (key >> 32) & 0x3FFFFFFF, key >> 62


def _broken(zone: str, start: int, row_id: int) -> Finding:
    what = (
        BROKEN
        if start >= row_id
        else f"rows {start} to {row_id} do not hash to the hash kept at row {row_id}: one of them "
        "was altered, added or deleted, or rows just before them were deleted"
    )
    return Finding(f"readings/{zone}", start, what, last_id=row_id)


def _in_worker(path: str, lo: int, hi: int, starts: dict, folds: dict, hashed_from: float) -> dict[str, list]:
    conn = sqlite3.connect(Path(path).resolve().as_uri() + "?mode=ro", uri=True)
    try:
        return walk_range(conn, lo, hi, starts, folds, hashed_from)
    finally:
        conn.close()


def walk_readings(conn, firsts: dict[str, int], folds: dict, hashed_from: float):
    """Every zone's chain from its row in `firsts` on: ({zone: rows checked} of the zones that
    hold, [first break of each zone that does not]). In worker processes when the record is
    big and there is more than one core."""
    last = conn.execute("SELECT max(id) FROM reading_rows").fetchone()[0] or 0
    first_id = min(firsts.values(), default=last + 1)
    path = file_path(conn)
    workers = os.cpu_count() or 1
    starts = {z: kept_before(conn, z, f) for z, f in firsts.items()}
    if not path or workers < 2 or last - first_id < PARALLEL_ROWS:
        parts = [walk_range(conn, first_id, last + 1, starts, folds, hashed_from)]
    else:
        step = (last + 1 - first_id) // workers + 1
        bounds = [(first_id + k * step, min(first_id + (k + 1) * step, last + 1)) for k in range(workers)]
        ctx = multiprocessing.get_context("spawn")  # never fork a process holding SQLite connections
        with ProcessPoolExecutor(max_workers=workers, mp_context=ctx) as pool:
            futures = []
            for k, (lo, hi) in enumerate(bounds):
                part_starts = starts if k == 0 else {z: max(starts[z], kept_before(conn, z, lo)) for z in firsts}
                futures.append(pool.submit(_in_worker, path, lo, hi, part_starts, folds, hashed_from))
            parts = [f.result() for f in futures]
    counts: dict[str, int] = {}
    breaks: dict[str, Finding] = {}
    newest: dict[str, tuple[int, bool, int]] = {}
    for part in parts:  # in row order: a zone's first break is the earliest range's
        for zone, (n, found, row_id, kept, ok_id) in part.items():
            counts[zone] = counts.get(zone, 0) + n
            if found is not None and zone not in breaks:
                breaks[zone] = found
            if row_id:
                ok_id = max(ok_id, newest.get(zone, (0, False, 0))[2])
                newest[zone] = (row_id, kept, ok_id)
    for zone, (row_id, kept, ok_id) in newest.items():
        if not kept and zone not in breaks:
            what = (
                f"no hash from this row on is kept, up to the zone's newest row {row_id}, which must keep one: "
                "hashes were removed, or rows after the last one deleted"
            )
            breaks[zone] = Finding(f"readings/{zone}", ok_id + 1, what, "MISSING", last_id=row_id)
    return {z: n for z, n in counts.items() if z not in breaks}, [breaks[z] for z in sorted(breaks)]


def running(conn, zone: str, upto_id: int, folds: dict, hashed_from: float) -> dict[int, str]:
    """The zone's running hash at each of its rows up to upto_id (retention needs the hash of
    a row it deletes when the row after it stays, and most rows keep none)."""
    hasher = ReadingHasher()
    links = folds.get(f"readings/{zone}", {})
    prev, out = None, {}
    cols = ", ".join(READING_FIELDS)
    for row_id, stored, *values in stream(
        conn, f"SELECT id, chain, {cols} FROM readings WHERE zone = ? AND id <= ? ORDER BY id", (zone, upto_id)
    ):
        if row_id < hashed_from:
            continue
        prev = out[row_id] = follow(hasher, prev, row_id, tuple(values), stored, links)
    return out
