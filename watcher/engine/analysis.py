"""Events and their costs for one zone, from stored readings. Runs inside the writer's
transaction, at checkpoints, when the zone's model time has moved `analyse_every_s` on.

- Door and defrost intervals come from their signals; defrosts are inferred from the air where
  a zone has no defrost signal; the rest of the warm time is split into excursions.
- Detected events are matched to stored ones by overlap (an inferred event's edges can move a
  sample as more data arrives), so re-analysing a span never duplicates an event.
- Each closed event gets a forecast cost soon after it ends (the recorded air, then the setpoint
  assumed from now until its recovery tail has passed) and a final cost once the recorded data
  cover the tail.
- Each site-local day, once its tail is covered, is split into baseline growth at setpoint and
  excess by cause (daily_growth table).

Costs start from hourly model snapshots (zone_snapshots) and use the zone's air averaged into
one-minute bins; the live model uses the readings themselves, so the two differ slightly.
"""

from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass, field
from zoneinfo import ZoneInfo

import numpy as np

from watcher.events.attribution import attribute, day_growth, default_tail_s
from watcher.events.detect import BaselineMemo, Event, excursions, infer_defrosts, state_intervals
from watcher.model.integrator import Spec, State
from watcher.store.db import Store
from watcher.store.zones import pack_state, unpack_state

BIN_S = 60.0
CONTEXT_S = 2 * 86400.0  # air before the span, for the detector's baseline and regularity
SNAPSHOT_KEEP_S = 10 * 86400.0
DAYS_BACK = 8  # daily figures are filled in for at most this many days back
FORECAST_STEP_S = 600.0
MAX_LEAD_S = 2 * 86400.0  # a day's figures start from a model state at most this far before it


def analysis_points(after_ts: float, fed_ts: float, every_s: float) -> list[float]:
    """The last grid point of data time (a multiple of every_s) in (after_ts, fed_ts], if any.
    Passes sit on the grid, so feeds whose batches each move less than a grid step (live data,
    the demo's two paths) analyse at the same moments; a zone that moved several steps at once
    (a backlog, a first start) is analysed once, at the last, over everything since its last
    pass (analysing every step passed would multiply the work of a slow backlog drain)."""
    if not math.isfinite(fed_ts):
        return []
    last = math.floor(fed_ts / every_s) * every_s
    return [last] if last > after_ts else []


@dataclass
class Findings:
    defrosts_today: int = 0
    costed: list[dict] = field(default_factory=list)  # events costed in this pass
    days: list[str] = field(default_factory=list)  # days whose daily figures were written


def binned_air(store: Store, zone_id: str, after_ts: float, upto_ts: float) -> tuple[np.ndarray, np.ndarray]:
    """The zone's air readings in (after_ts, upto_ts], every sensor averaged into one-minute
    bins (bin start times), summed by the database."""
    return bin_means(store.readings.bins(zone_id, "air_c", after_ts, upto_ts, BIN_S))


def bin_means(bins) -> tuple[np.ndarray, np.ndarray]:
    """(bin start times, mean air) of the store's (k, sum, count) one-minute bins."""
    k, sums, counts = bins
    return k * BIN_S, sums / counts


def air_samples(store: Store, zone_id: str, after_ts: float, upto_ts: float) -> tuple[np.ndarray, np.ndarray]:
    """The zone's air as one sample per whole one-minute bin, stamped at the bin's end (when its
    mean is known), for the samples in (after_ts, upto_ts]. The same readings always give the same
    samples, however the span is cut (lots and the what-if replay rely on it)."""
    starts, air = binned_air(store, zone_id, after_ts - BIN_S, upto_ts)
    t = starts + BIN_S
    keep = (t > after_ts) & (t <= upto_ts)
    return t[keep], air[keep]


def _intervals(rows, kind: str) -> list[Event]:
    by_sensor: dict[str, list] = {}
    for sensor, _, ts, value in rows:
        by_sensor.setdefault(sensor, []).append((ts, value))
    out = []
    for pairs in by_sensor.values():
        t = np.array([p[0] for p in pairs])
        out += state_intervals(t, np.array([p[1] for p in pairs]), kind)
    return out


def detect(
    store: Store, zone, events_cfg, span_start: float, fed_ts: float, memo: BaselineMemo | None = None
) -> list[Event]:
    """All events overlapping (span_start, fed_ts], with context before the span (memo: the
    zone's previous pass, which saves the detector work and never changes what it finds)."""
    since = span_start - CONTEXT_S
    t, air = binned_air(store, zone.id, since, fed_ts)
    doors = _intervals(store.readings.signals(zone.id, ("door",), since, fed_ts), "door")
    defrost_rows = store.readings.signals(zone.id, ("defrost",), since, fed_ts)
    if defrost_rows:
        defrosts = _intervals(defrost_rows, "defrost")
    elif events_cfg.infer_defrosts and t.size:
        defrosts = infer_defrosts(t, air, doors, events_cfg.defrost, memo)
    else:
        defrosts = []
    warm = excursions(t, air, zone.setpoint_c, doors + defrosts, events_cfg.excursion_k, events_cfg.excursion_min_s)
    found = doors + defrosts + warm
    return [e for e in found if e.end_ts is None or e.end_ts > span_start]


def _overlap(a: Event, stored: dict, fed_ts: float) -> bool:
    a_end = fed_ts if a.end_ts is None else a.end_ts
    b_end = fed_ts if stored["end_ts"] is None else stored["end_ts"]
    return a.kind == stored["kind"] and a.start_ts <= b_end and stored["start_ts"] <= a_end


def merge_events(store: Store, zone_id: str, found: list[Event], span_start: float, fed_ts: float) -> None:
    """Store what was found; update overlapping stored events; drop stored inferred events of
    the span that are no longer found (the detector saw more data and changed its mind)."""
    stored = store.events.of_zone(zone_id, span_start)
    matched: set[int] = set()
    for e in found:
        detail = {"source": e.source, "peak_c": None if e.peak_c is None else round(e.peak_c, 3)}
        same = next((s for s in stored if s["id"] not in matched and _overlap(e, s, fed_ts)), None)
        if same is not None:
            matched.add(same["id"])
            if same["start_ts"] == e.start_ts and same["end_ts"] == e.end_ts:
                continue
            if same["start_ts"] != e.start_ts:
                store.events.delete(same["id"])  # the key moved; costs are redone
        store.events.upsert(zone_id, e.kind, e.start_ts, e.end_ts, detail)
    for s in stored:
        if s["id"] not in matched and s.get("source") == "inferred" and s["start_ts"] >= span_start:
            store.events.delete(s["id"])


def _history(store: Store, zone_id: str, t0: float, t1: float) -> tuple[np.ndarray, np.ndarray]:
    t, air = binned_air(store, zone_id, t0, t1)
    keep = t > t0
    return t[keep], air[keep]


def _start_state(store: Store, zone_id: str, key: str, at_ts: float) -> State | None:
    snap = store.snapshots.before(zone_id, at_ts, key)
    return None if snap is None else State.from_arrays(unpack_state(snap[1]))


def cost_events(store: Store, zone, spec: Spec, key: str, fed_ts: float) -> list[dict]:
    """Forecast or final costs for closed events that need one; returns what was costed, each
    with `first_cost` True when the event had no cost before (the alert rules judge only those,
    so a final cost does not raise a second alert for the same event)."""
    tail = default_tail_s(spec)
    todo = []
    for s in store.events.of_zone(zone.id, fed_ts - SNAPSHOT_KEEP_S):
        if s["end_ts"] is None or s.get("cost") == "final":
            continue
        final = s["end_ts"] + tail <= fed_ts
        if final or s.get("cost") is None:
            todo.append((s, final))
    first = store.snapshots.first_ts(zone.id, key)
    done = []
    for final in (True, False):
        group = [s for s, f in todo if f is final and first is not None and s["start_ts"] >= first]
        if not group:
            continue
        start = _start_state(store, zone.id, key, min(s["start_ts"] for s in group))
        if start is None:
            continue
        t, air = _history(store, zone.id, start.time_ts, fed_ts)
        if not final:  # assume the setpoint from now until the last tail has passed
            until = max(s["end_ts"] for s in group) + tail
            after = max(fed_ts, t[-1]) if t.size else fed_ts
            extra = np.arange(after + FORECAST_STEP_S, until + FORECAST_STEP_S, FORECAST_STEP_S)
            t = np.concatenate([t, extra])
            air = np.concatenate([air, np.full(extra.size, zone.setpoint_c)])
        if t.size == 0:
            continue
        events = [Event(s["kind"], s["start_ts"], s["end_ts"]) for s in group]
        costs, _ = attribute(spec, start, t, air, zone.setpoint_c, events, tail)
        for s, c in zip(group, costs):
            detail = {
                "cost": "final" if final else "forecast",
                "excess_um": round(c.excess_um, 4),
                "budget_share_pct": round(c.budget_share_pct, 4),
            }
            store.events.upsert(zone.id, s["kind"], s["start_ts"], s["end_ts"], detail)
            done.append({**s, **detail, "first_cost": s.get("cost") is None})
    return done


def local_days(tz: str, t0: float, t1: float) -> list[tuple[str, float, float]]:
    """(ISO date, start_ts, end_ts) of the whole site-local days inside (t0, t1]."""
    zone = ZoneInfo(tz)
    day = dt.datetime.fromtimestamp(t0, zone).date() + dt.timedelta(days=1)
    out = []
    while True:
        start = dt.datetime.combine(day, dt.time(), zone).timestamp()
        end = dt.datetime.combine(day + dt.timedelta(days=1), dt.time(), zone).timestamp()
        if end > t1:
            return out
        out.append((day.isoformat(), start, end))
        day += dt.timedelta(days=1)


def daily_figures(store: Store, zone, spec: Spec, key: str, tz: str, fed_ts: float) -> list[str]:
    """Write daily_growth rows for days whose recovery tail the data now cover."""
    tail = default_tail_s(spec)
    have = store.daily.days(zone.id)
    written = []
    carried = None  # the previous day's end state, when that day was computed in this pass
    for day, start_ts, end_ts in local_days(tz, fed_ts - DAYS_BACK * 86400.0, fed_ts - tail):
        if day in have:
            carried = None
            continue
        start = (
            carried
            if carried is not None and carried.time_ts <= start_ts
            else _start_state(store, zone.id, key, start_ts)
        )
        if start is None or start.time_ts < start_ts - MAX_LEAD_S:
            carried = None
            continue  # no model state near enough: the day is left out rather than replayed at length
        t, air = _history(store, zone.id, start.time_ts, end_ts + tail)
        if t.size == 0 or t[-1] <= end_ts:
            continue
        # Events overlapping the day, clipped to it: a day carries only its own part of an
        # event that spans midnight (the event's whole cost is on the event's row).
        events = [
            Event(s["kind"], max(s["start_ts"], start_ts), min(s["end_ts"], end_ts))
            for s in store.events.of_zone(zone.id, start_ts, end_ts)
            if s["end_ts"] is not None
        ]
        g = day_growth(spec, start, t, air, zone.setpoint_c, start_ts, end_ts, events)
        carried = g.end_state
        store.daily.save(
            {
                "zone": zone.id,
                "day": day,
                "position": g.position,
                "start_ts": start_ts,
                "end_ts": end_ts,
                "baseline_um": g.baseline_um,
                "defrost_um": g.by_cause_um.get("defrost", 0.0),
                "door_um": g.by_cause_um.get("door", 0.0),
                "excursion_um": g.by_cause_um.get("excursion", 0.0),
                "unattributed_um": g.unattributed_um,
                "total_excess_um": g.excess_um,
                "events": len(events),
            }
        )
        written.append(day)
    return written


def take_snapshot(store: Store, zone_id: str, key: str, state: State | None, last_ts: float) -> float:
    """Save the model state when it has crossed an hour since the last snapshot; return the
    time of the newest snapshot."""
    if state is None or math.isfinite(last_ts) and state.time_ts // 3600.0 <= last_ts // 3600.0:
        return last_ts
    store.snapshots.save(zone_id, state.time_ts, key, pack_state(state.arrays()))
    store.snapshots.drop(zone_id, before_ts=state.time_ts - SNAPSHOT_KEEP_S)
    return state.time_ts


def defrosts_on_day(store: Store, zone_id: str, tz: str, at_ts: float) -> int:
    day_start = dt.datetime.combine(dt.datetime.fromtimestamp(at_ts, ZoneInfo(tz)).date(), dt.time(), ZoneInfo(tz))
    t0 = day_start.timestamp()
    return sum(1 for e in store.events.of_zone(zone_id, t0) if e["kind"] == "defrost" and e["start_ts"] >= t0)


def analyse(
    store: Store,
    zone,
    spec: Spec,
    key: str,
    tz: str,
    events_cfg,
    span_start: float,
    fed_ts: float,
    memo: BaselineMemo | None = None,
) -> Findings:
    found = detect(store, zone, events_cfg, span_start, fed_ts, memo)
    merge_events(store, zone.id, found, span_start, fed_ts)
    return Findings(
        defrosts_today=defrosts_on_day(store, zone.id, tz, fed_ts),
        costed=cost_events(store, zone, spec, key, fed_ts),
        days=daily_figures(store, zone, spec, key, tz, fed_ts),
    )
