"""Per-zone records: the checkpoint (model state and figures), the retention anchor, gaps,
marks, the model snapshots attribution starts from, and daily growth by cause."""

from __future__ import annotations

import io
import json
from dataclasses import dataclass

import numpy as np

from watcher.store.repo import Repo, upsert


@dataclass
class ZoneRow:
    zone: str
    spec_key: str
    fed_ts: float | None
    state: dict | None
    sensors: dict
    figures: dict
    readings_total: int
    last_ts: float | None
    last_air_c: float | None
    last_product_c: float | None
    updated_ts: float


ZONE_COLUMNS = (
    "zone, spec_key, fed_ts, state, sensors, figures, readings_total, last_ts, last_air_c, last_product_c, updated_ts"
)


def pack_state(arrays: dict[str, np.ndarray]) -> bytes:
    buf = io.BytesIO()
    np.savez(buf, **arrays)
    return buf.getvalue()


def unpack_state(blob: bytes) -> dict[str, np.ndarray]:
    with np.load(io.BytesIO(blob)) as data:
        return {k: data[k] for k in data.files}


class Zones(Repo):
    def save(self, row: ZoneRow) -> None:
        state = None if row.state is None else pack_state(row.state)
        self.conn.execute(
            upsert("zone_state", ZONE_COLUMNS, "zone"),
            (
                row.zone,
                row.spec_key,
                row.fed_ts,
                state,
                json.dumps(row.sensors),
                json.dumps(row.figures),
                row.readings_total,
                row.last_ts,
                row.last_air_c,
                row.last_product_c,
                row.updated_ts,
            ),
        )

    def rows(self) -> dict[str, ZoneRow]:
        out = {}
        for r in self.conn.execute(f"SELECT {ZONE_COLUMNS} FROM zone_state"):
            state = None if r[3] is None else unpack_state(r[3])
            out[r[0]] = ZoneRow(r[0], r[1], r[2], state, json.loads(r[4]), json.loads(r[5]), *r[6:])
        return out

    def anchor(self, zone: str) -> tuple | None:
        """(spec_key, fed_ts, state, sensors) retention left the zone at, if any."""
        row = self.conn.execute(
            "SELECT spec_key, fed_ts, state, sensors FROM zone_anchor WHERE zone = ?", (zone,)
        ).fetchone()
        if row is None:
            return None
        return row[0], row[1], None if row[2] is None else unpack_state(row[2]), json.loads(row[3])

    def anchor_save(self, zone: str, spec_key: str, fed_ts: float | None, state: dict | None, sensors: dict) -> None:
        self.conn.execute(
            upsert("zone_anchor", "zone, spec_key, fed_ts, state, sensors", "zone"),
            (zone, spec_key, fed_ts, None if state is None else pack_state(state), json.dumps(sensors)),
        )

    def marks(self) -> dict[tuple[str, str], float]:
        return {(z, m): v for z, m, v in self.conn.execute("SELECT zone, mark, value FROM zone_marks")}

    def mark_set(self, zone: str, mark: str, value: float) -> None:
        self.conn.execute(upsert("zone_marks", "zone, mark, value", "zone, mark"), (zone, mark, value))


class Gaps(Repo):
    def add(self, zone: str, start_ts: float, end_ts: float) -> None:
        self.conn.execute(
            "INSERT OR IGNORE INTO gaps (zone, start_ts, end_ts, seconds) VALUES (?,?,?,?)",
            (zone, start_ts, end_ts, end_ts - start_ts),
        )

    def list(self, zone: str | None = None) -> list[tuple]:
        """(zone, start_ts, end_ts, seconds) in time order."""
        where, args = (" WHERE zone = ?", (zone,)) if zone else ("", ())
        return list(
            self.conn.execute(f"SELECT zone, start_ts, end_ts, seconds FROM gaps{where} ORDER BY start_ts", args)
        )


class Snapshots(Repo):
    def save(self, zone: str, time_ts: float, spec_key: str, blob: bytes) -> None:
        self.conn.execute(
            upsert("zone_snapshots", "zone, time_ts, spec_key, state", "zone, time_ts"),
            (zone, time_ts, spec_key, blob),
        )

    def before(self, zone: str, time_ts: float, spec_key: str) -> tuple[float, bytes] | None:
        return self.conn.execute(
            "SELECT time_ts, state FROM zone_snapshots WHERE zone = ? AND spec_key = ? AND time_ts <= ? ORDER BY time_ts DESC LIMIT 1",
            (zone, spec_key, time_ts),
        ).fetchone()

    def first_after(self, zone: str, t0_ts: float, t1_ts: float, spec_key: str) -> tuple[float, bytes] | None:
        return self.conn.execute(
            "SELECT time_ts, state FROM zone_snapshots WHERE zone = ? AND spec_key = ? AND time_ts > ? AND time_ts < ? "
            "ORDER BY time_ts LIMIT 1",
            (zone, spec_key, t0_ts, t1_ts),
        ).fetchone()

    def first_ts(self, zone: str, spec_key: str) -> float | None:
        return self.conn.execute(
            "SELECT min(time_ts) FROM zone_snapshots WHERE zone = ? AND spec_key = ?", (zone, spec_key)
        ).fetchone()[0]

    def drop(self, zone: str, before_ts: float | None = None, after_ts: float | None = None) -> None:
        if before_ts is not None:  # older than that, keep the first of each UTC day (for reports)
            self.conn.execute(
                "DELETE FROM zone_snapshots WHERE zone = ? AND time_ts < ? AND time_ts NOT IN ("
                "SELECT min(time_ts) FROM zone_snapshots WHERE zone = ? GROUP BY CAST(time_ts / 86400 AS INTEGER))",
                (zone, before_ts, zone),
            )
        if after_ts is not None:
            self.conn.execute("DELETE FROM zone_snapshots WHERE zone = ? AND time_ts >= ?", (zone, after_ts))


class Daily(Repo):
    """Daily growth by cause, one row per zone and site day."""

    def save(self, row: dict) -> None:
        self.conn.execute(upsert("daily_growth", ", ".join(row), "zone, day"), tuple(row.values()))

    def days(self, zone: str) -> set[str]:
        return {r[0] for r in self.conn.execute("SELECT day FROM daily_growth WHERE zone = ?", (zone,))}

    def rows(self, zone: str | None = None) -> list[dict]:
        where, args = (" WHERE zone = ?", (zone,)) if zone else ("", ())
        cur = self.conn.execute(f"SELECT * FROM daily_growth{where} ORDER BY zone, day", args)
        names = [d[0] for d in cur.description]
        return [dict(zip(names, r)) for r in cur.fetchall()]
