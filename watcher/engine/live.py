"""What a zone's rules need between analyses (door and defrost switches, each sensor's newest
receive time, the latest figures and event cost), and the observations made from it."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from watcher.engine.zones import ZoneRunner
from watcher.ranges import cautious_days
from watcher.store.db import Store


@dataclass
class Live:
    """What a zone's rules need between analyses: switches, receive times, last costs."""

    switches: dict = field(default_factory=dict)  # (signal, sensor) -> [last_ts, value, since_ts]
    received: dict = field(default_factory=dict)  # (sensor, signal) -> wall time of its newest reading
    figures: dict | None = None
    air_c: float | None = None
    defrosts_today: int | None = None
    event_cost: tuple[float, float] | None = None  # (budget share %, excess um) of the latest costed event
    snapshot_ts: float = -math.inf
    analysed_ts: float = -math.inf

    def switch(self, signal: str, sensor: str, ts: float, value: float) -> None:
        cur = self.switches.get((signal, sensor))
        if cur is not None and ts < cur[0]:
            return  # an older reading; the analysis sorts the record out
        was_on = cur is not None and cur[1] >= 0.5
        since = cur[2] if was_on and value >= 0.5 else ts
        self.switches[(signal, sensor)] = [ts, value, since]

    def on_for(self, signal: str, now_ts: float) -> float | None:
        """Seconds the longest-running 'on' switch of this signal has been on; None without sensors."""
        states = [v for (sig, _), v in self.switches.items() if sig == signal]
        if not states:
            return None
        return max((now_ts - since for _, value, since in states if value >= 0.5), default=0.0)


def load_live(store: Store, zone_ids) -> dict[str, Live]:
    """Each zone's live state as the record left it (switches, receive times, marks)."""
    out = {zid: Live() for zid in zone_ids}
    marks = store.zones.marks()
    for zid, lz in out.items():
        for sensor, signal, ts, value, since in store.readings.switch_state(zid):
            lz.switches[(signal, sensor)] = [ts, value, since]
        lz.received = store.readings.last_received(zid)
        lz.analysed_ts = marks.get((zid, "analysed_ts"), -math.inf)
        lz.snapshot_ts = marks.get((zid, "snapshot_ts"), -math.inf)
    return out


def zone_observations(runner: ZoneRunner, lz: Live) -> dict:
    """What the zone rules judge, at the zone's data time."""
    now = runner.last_ts
    f = lz.figures or {}
    fresh = [v for t, v in runner.air.values() if runner.air and now - t <= runner.max_gap]
    return {
        "budget_used_pct": f.get("budget_used_pct"),
        # Rules on days left judge the cautious end of the range (the rule's label says so).
        "days_to_limit": cautious_days(f),
        "product_c": f.get("product_c"),
        "air_c": runner.last_air_c,
        "door_open_s": lz.on_for("door", now),
        "defrost_s": lz.on_for("defrost", now),
        "defrosts_today": lz.defrosts_today,
        "sensor_spread_k": max(fresh) - min(fresh) if len(fresh) >= 2 else None,
        "event_budget_share_pct": None if lz.event_cost is None else lz.event_cost[0],
        "event_excess_um": None if lz.event_cost is None else lz.event_cost[1],
    }


def stalest(received: dict, wall_ts: float, forget_s: float) -> tuple[float | None, str | None]:
    """The oldest silence among a zone's steadily reporting sensors, and which one it is
    ("s1 (air_c)"); a sensor silent for forget_s or longer no longer counts."""
    ages = [(wall_ts - t, f"{sensor} ({signal})") for (sensor, signal), t in received.items() if wall_ts - t < forget_s]
    if not ages:
        return None, None
    age, which = max(ages)
    return age, which
