"""What a zone's rules need between judgements (door and defrost switches, each air sensor's
latest value, each sensor's newest receive time, the new readings not yet judged, the
latest figures and event cost), and the staleness observation made from it."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from watcher.events.detect import BaselineMemo
from watcher.store.db import Store


@dataclass
class Live:
    """What a zone's rules need between analyses: switches, receive times, last costs."""

    switches: dict = field(default_factory=dict)  # (signal, sensor) -> [last_ts, value, since_ts]
    air: dict = field(default_factory=dict)  # sensor -> (ts, value) of its latest air reading judged
    inbox: list = field(default_factory=list)  # (ts, sensor, signal, value) stored, not yet judged
    judged_ts: float = -math.inf  # the reading rules have been judged up to here (data time)
    model_judged_ts: float = -math.inf  # the model rules likewise
    model_now: dict = field(default_factory=dict)  # the model values at model_judged_ts
    received: dict = field(default_factory=dict)  # (sensor, signal) -> wall time of its newest reading
    figures: dict | None = None
    air_c: float | None = None
    defrosts_today: int | None = None
    event_cost: tuple[float, float] | None = None  # (budget share %, excess um) of the latest costed event
    snapshot_ts: float = -math.inf
    analysed_ts: float = -math.inf
    baseline: BaselineMemo = field(default_factory=BaselineMemo)  # the defrost detector's last pass (work saved)

    def switch(self, signal: str, sensor: str, ts: float, value: float) -> None:
        cur = self.switches.get((signal, sensor))
        if cur is not None and ts < cur[0]:
            return  # an older reading; the analysis sorts the record out
        was_on = cur is not None and cur[1] >= 0.5
        since = cur[2] if was_on and value >= 0.5 else ts
        self.switches[(signal, sensor)] = [ts, value, since]

    def apply(self, ts: float, sensor: str, signal: str, value: float) -> None:
        """One reading taken into the state the rules see."""
        if signal == "air_c":
            if ts >= self.air.get(sensor, (-math.inf, 0.0))[0]:
                self.air[sensor] = (ts, value)
        else:
            self.switch(signal, sensor, ts, value)

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
        lz.judged_ts = marks.get((zid, "judged_ts"), -math.inf)
        lz.model_judged_ts = marks.get((zid, "model_judged_ts"), -math.inf)
        for sensor, signal, ts, value, since in store.readings.switch_state(zid):
            lz.switches[(signal, sensor)] = [ts, value, since]
        lz.received = store.readings.last_received(zid)
        lz.analysed_ts = marks.get((zid, "analysed_ts"), -math.inf)
        lz.snapshot_ts = marks.get((zid, "snapshot_ts"), -math.inf)
    return out


def stalest(received: dict, wall_ts: float, forget_s: float) -> tuple[float | None, str | None]:
    """The oldest silence among a zone's steadily reporting sensors, and which one it is
    ("s1 (air_c)"); a sensor silent for forget_s or longer no longer counts."""
    ages = [(wall_ts - t, f"{sensor} ({signal})") for (sensor, signal), t in received.items() if wall_ts - t < forget_s]
    if not ages:
        return None, None
    age, which = max(ages)
    return age, which
