"""Everything one site-week's summary needs, read from the database into pandas frames.

Read-only. The model is re-run over the week from the zone's snapshot at or before the week's
start (kept one a day for the retention period), on the air averaged into one-minute bins, the
same input the event costs use; the live figures use the readings themselves, so the two can
differ in the last decimal.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from watcher.config import Config, Site, Zone
from watcher.engine.analysis import BIN_S, bin_means, binned_air
from watcher.engine.route import site_of_topic
from watcher.engine.zones import spec_key
from watcher.model.additive import additive_budget_pct
from watcher.model.integrator import Spec, State, advance, outputs
from watcher.model.thermal import lag_series
from watcher.ranges import RANGE_KEYS
from watcher.report.week import Week
from watcher.simulation import position_rows, worst_position
from watcher.store.db import Store
from watcher.store.zones import unpack_state


@dataclass
class ZoneModel:
    start_note: str  # where the week's model run started from
    time_ts: np.ndarray  # air sample times in the week
    air_c: np.ndarray
    product_c: np.ndarray  # the warmest exposure position at each sample
    trace_ts: np.ndarray  # hourly
    mean_diameter_um: np.ndarray  # hourly, the worst position at the week's end
    position: str
    budget_start_pct: float | None
    budget_end_pct: float | None
    days_to_limit_end: float | None
    mean_start_um: float | None
    mean_end_um: float | None
    limit_um: float
    ranges_end: dict = field(default_factory=dict)  # 90 % ranges of budget and days at the week's end
    additive_rule_end_pct: float | None = None  # the additive rule from the week's start budget


@dataclass
class SiteWeek:
    site: Site
    week: Week
    zones: list[Zone]
    events: pd.DataFrame
    alerts: pd.DataFrame
    alert_log: pd.DataFrame
    gaps: pd.DataFrame
    rejections: pd.DataFrame
    daily: pd.DataFrame
    models: dict[str, ZoneModel] = field(default_factory=dict)


_FIND = object()  # zone_model's start state: look it up


def _frame(table) -> pd.DataFrame:
    columns, rows = table
    return pd.DataFrame(rows, columns=columns)


def load(store: Store, cfg: Config, site: Site, week: Week) -> SiteWeek:
    zones = [z for z in cfg.zones if z.site == site.id]
    ids = tuple(z.id for z in zones)
    days = tuple(d for d, _, _ in week.days())
    tables = {k: _frame(t) for k, t in store.reports.week_tables(ids, week.start_ts, week.end_ts, days).items()}
    events = tables["events"]
    details = [json.loads(d) for d in events["detail"]] if len(events) else []
    for key in ("source", "peak_c", "excess_um", "budget_share_pct", "cost"):
        events[key] = [d.get(key) for d in details] if len(events) else []
    events = events.drop(columns=["detail"])
    alerts, alert_log = tables["alerts"], tables["alert_log"]
    gaps, rejections, daily = tables["gaps"], tables["rejections"], tables["daily"]
    if len(cfg.sites) > 1 and len(rejections):  # a central record: this site's, and those no site can claim
        rejections = rejections[[site_of_topic(cfg, t) in (site.id, None) for t in rejections["topic"]]]
    sw = SiteWeek(site, week, zones, events, alerts, alert_log, gaps, rejections, daily)
    starts = {z.id: _start_snapshot(store, z, week.start_ts, week.end_ts, "week") for z in zones}
    found = [snap[0][0] for snap in starts.values() if snap is not None]
    # Every zone's air from the earliest start state on, in one pass over the rows (each zone
    # then drops the bins before its own start state, as binned_air's own range would).
    air = store.reports.zone_bins(ids, "air_c", min(found), week.end_ts, BIN_S) if found else {}
    for z in zones:
        sw.models[z.id] = zone_model(store, z, week.start_ts, week.end_ts, start=starts[z.id], air=air.get(z.id))
    return sw


def _start_snapshot(store: Store, zone: Zone, start_ts: float, end_ts: float, period: str):
    """(snapshot row, note) the zone's model starts from: the state saved at or before the
    period's start, else the first inside it; None when there is neither."""
    key = spec_key(zone)
    snap = store.snapshots.before(zone.id, start_ts, key)
    if snap is not None:
        return snap, f"from the model state saved before the {period} began"
    snap = store.snapshots.first_after(zone.id, start_ts, end_ts, key)
    note = (
        f"from the first model state saved inside the {period} (no earlier state: figures cover part of the {period})"
    )
    return None if snap is None else (snap, note)


def zone_model(
    store: Store, zone: Zone, start_ts: float, end_ts: float, period: str = "week", start=_FIND, air=None
) -> ZoneModel | None:
    """The zone's model re-run over [start_ts, end_ts] (a week, or the site page's last day)
    from the snapshot saved at or before its start (start: that, found already by the caller;
    air: the zone's binned air from at least that snapshot's time to end_ts, read already)."""
    spec = Spec(zone.profile, zone.positions)
    start = _start_snapshot(store, zone, start_ts, end_ts, period) if start is _FIND else start
    if start is None:
        return None
    snap, note = start
    state = State.from_arrays(unpack_state(snap[1]))
    t, air = binned_air(store, zone.id, state.time_ts, end_ts) if air is None else bin_means(air)
    t, air = t[t > state.time_ts], air[t > state.time_ts]
    before = t <= start_ts
    if before.any():
        state, _ = advance(spec, state, t[before], air[None, before])
    t, air = t[~before], air[~before]
    start_rows = position_rows(spec, outputs(spec, state))
    start_air, start_t, start_product = float(state.air_c[0]), state.time_ts, state.product_c[0].copy()
    end_state, trace = advance(spec, state, t, air[None, :], trace=True) if t.size else (state, None)
    end_rows = position_rows(spec, outputs(spec, end_state))
    worst = worst_position(end_rows)
    w = [p.name for p in spec.positions].index(worst)
    lagged = []
    held = np.concatenate(([start_air], air[:-1])) if t.size else np.empty(0)
    dt = np.diff(np.concatenate(([start_t], t))) if t.size else np.empty(0)
    for i, p in enumerate(spec.positions):
        if p.probe or not t.size:
            continue
        lagged.append(lag_series(np.array([start_product[i]]), held[None, :], dt, p.tau_s)[0, 1:])
    product = np.max(lagged, axis=0) if lagged else np.full(t.size, np.nan)
    return ZoneModel(
        start_note=note,
        time_ts=t,
        air_c=air,
        product_c=product,
        trace_ts=trace.time_ts if trace is not None else np.empty(0),
        mean_diameter_um=trace.mean_diameter_um[:, 0, w] if trace is not None else np.empty(0),
        position=worst,
        budget_start_pct=start_rows[worst]["budget_used_pct"],
        budget_end_pct=end_rows[worst]["budget_used_pct"],
        days_to_limit_end=end_rows[worst]["days_to_limit"],
        mean_start_um=start_rows[worst]["mean_diameter_um"],
        mean_end_um=end_rows[worst]["mean_diameter_um"],
        limit_um=zone.profile.limit_mean_diameter_um,
        ranges_end={k: end_rows[worst][k] for k in RANGE_KEYS},
        additive_rule_end_pct=_additive_end(spec, start_t, start_air, start_product, t, air, w, start_rows[worst]),
    )


def _additive_end(spec, start_t, start_air, start_product, t, air, w, start_row) -> float | None:
    """The additive rule's budget at the week's end, continued from the model's start budget."""
    if not t.size or start_row["budget_used_pct"] is None:
        return None
    rule = additive_budget_pct(
        spec,
        np.concatenate(([start_t], t)),
        np.concatenate(([start_air], air))[None, :],
        start_product[None, :],
        start_row["budget_used_pct"],
    )
    return float(rule[0, w])
