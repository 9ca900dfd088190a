"""Lots: the lots, their events (arrive, move, depart) and each lot's model state."""

from __future__ import annotations

import json

from watcher.lots.events import last_zone
from watcher.store import chain
from watcher.store.repo import Repo, upsert

LOT_EVENT_INSERT = chain.Append("lot_events", chain.LOT_EVENT_FIELDS)


class Lots(Repo):
    def history(self, lot: str) -> list[tuple[str, str | None, float]]:
        return self.conn.execute(
            "SELECT kind, zone, ts FROM lot_events WHERE lot = ? ORDER BY ts, id", (lot,)
        ).fetchall()

    def event_add(self, ev, source: str, sender: str | None, received_ts: float) -> None:
        """Record a validated event; an event before the lot's computed state sends the lot
        back to be recomputed from its arrival."""
        detail = None
        if ev.kind == "arrive":
            self.conn.execute(
                "INSERT INTO lots (lot, product, initial, note, created_ts) VALUES (?,?,?,?,?)",
                (ev.lot, ev.product, json.dumps(ev.initial), ev.note, received_ts),
            )
            detail = json.dumps({"product": ev.product, "initial": ev.initial}, sort_keys=True)
        values = (ev.lot, ev.kind, ev.zone, ev.ts, source, sender, received_ts, ev.note, detail)
        LOT_EVENT_INSERT.run(self.conn, values)
        self.conn.execute("DELETE FROM lot_state WHERE lot = ? AND time_ts > ?", (ev.lot, ev.ts))

    def info(self, lot: str) -> dict | None:
        row = self.conn.execute("SELECT product, initial, note, created_ts FROM lots WHERE lot = ?", (lot,)).fetchone()
        if row is None:
            return None
        return {"lot": lot, "product": row[0], "initial": json.loads(row[1]), "note": row[2], "created_ts": row[3]}

    def touching(self, zone: str) -> list[str]:
        """Lots with any stay in the zone whose computed state has not passed that stay."""
        return [
            r[0]
            for r in self.conn.execute(
                "SELECT DISTINCT e.lot FROM lot_events e LEFT JOIN lot_state s ON s.lot = e.lot "
                "WHERE e.zone = ? AND NOT EXISTS (SELECT 1 FROM lot_events d WHERE d.lot = e.lot AND d.kind = 'depart' "
                "AND s.time_ts IS NOT NULL AND d.ts <= s.time_ts)",
                (zone,),
            )
        ]

    def state_get(self, lot: str) -> tuple[float, bytes, dict] | None:
        row = self.conn.execute("SELECT time_ts, state, figures FROM lot_state WHERE lot = ?", (lot,)).fetchone()
        return None if row is None else (row[0], row[1], json.loads(row[2]))

    def state_save(self, lot: str, time_ts: float, blob: bytes, figures: dict, now_ts: float) -> None:
        self.conn.execute(
            upsert("lot_state", "lot, time_ts, state, figures, updated_ts", "lot"),
            (lot, time_ts, blob, json.dumps(figures), now_ts),
        )

    def states_drop_after(self, zone: str, ts: float) -> None:
        """A zone's past changed at ts (a late reading): lots that sat there since are recomputed."""
        self.conn.execute(
            "DELETE FROM lot_state WHERE time_ts > ? AND lot IN (SELECT lot FROM lot_events WHERE zone = ?)", (ts, zone)
        )

    def overview(self) -> list[dict]:
        """Every lot with its current zone, arrival, departure and last computed figures."""
        out = []
        for lot, product in self.conn.execute("SELECT lot, product FROM lots ORDER BY lot"):
            history = self.history(lot)
            state = self.state_get(lot)
            last_kind, _, last_ts = history[-1] if history else (None, None, None)
            out.append(
                {
                    "lot": lot,
                    "product": product,
                    "zone": last_zone(history),
                    "present": last_kind != "depart",
                    "arrived_ts": history[0][2] if history else None,
                    "departed_ts": last_ts if last_kind == "depart" else None,
                    "history": history,
                    "figures": state[2] if state else None,
                }
            )
        return out
