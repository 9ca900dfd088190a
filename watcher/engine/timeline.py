"""The data times a zone's rules are judged at, and what each rule sees there.

Rules are judged on the readings' own times, whatever the batching: every multiple of STEP_S
of data time that the zone has passed since it was last judged, and the newest time itself
(so a live reading is judged the moment it arrives). A backlog that arrives in one batch is
stepped through minute by minute, so a door opened and closed inside it, or a fault that came
and went, is judged as it happened; the same readings arriving live give the same alerts, with
times within one step.

Three sources, each with its own horizon (metrics.py says which metric reads which):
- readings: air temperature, door and defrost switches, sensor spread, up to the newest reading;
- model: estimated product temperature (every sample the model was fed), budget used and days
  to the limit (every macro end of the model), up to what the model has been fed;
- events: the event analysis, at its own grid points (engine/analysis.py).
"""

from __future__ import annotations

import math
from collections.abc import Iterator

import numpy as np

from watcher.engine.live import Live

STEP_S = 60.0


def judge_points(after_ts: float, upto_ts: float, step_s: float = STEP_S) -> list[float]:
    """The multiples of step_s in (after_ts, upto_ts], and upto_ts itself."""
    if not upto_ts > after_ts:
        return []
    first, last = math.floor(after_ts / step_s) + 1, math.floor(upto_ts / step_s)
    points = [k * step_s for k in range(first, last + 1)]
    if not points or points[-1] < upto_ts:
        points.append(upto_ts)
    return points


def reading_observations(lz: Live, at_ts: float, max_gap_s: float) -> dict:
    """What the reading rules see at at_ts, from the readings applied so far."""
    fresh = [v for t, v in lz.air.values() if at_ts - t <= max_gap_s]
    values = fresh or [v for _, v in lz.air.values()]
    switched = bool(lz.switches)  # most zones have no contacts: no need to look
    return {
        "air_c": sum(values) / len(values) if values else None,
        "door_open_s": lz.on_for("door", at_ts) if switched else None,
        "defrost_s": lz.on_for("defrost", at_ts) if switched else None,
        "sensor_spread_k": max(fresh) - min(fresh) if len(fresh) >= 2 else None,
    }


def reading_steps(lz: Live, upto_ts: float, max_gap_s: float) -> Iterator[tuple[float, dict]]:
    """Step the zone's new readings (lz.inbox) through the judge points up to upto_ts,
    yielding (time, observations); leaves every reading applied and lz.judged_ts moved on."""
    items = sorted(lz.inbox)
    lz.inbox.clear()
    if not math.isfinite(lz.judged_ts):
        if not items:
            return
        lz.judged_ts = items[0][0] - 1e-3
    i = 0
    for at in judge_points(lz.judged_ts, upto_ts):
        while i < len(items) and items[i][0] <= at:
            lz.apply(*items[i])
            i += 1
        lz.judged_ts = at
        yield at, reading_observations(lz, at, max_gap_s)
    for item in items[i:]:  # older than what was judged already (late): they still set the state
        lz.apply(*item)


def model_steps(lz: Live, chunks: list[dict]) -> Iterator[tuple[float, dict]]:
    """Step what the model produced (chunks of ZoneRunner.take_steps) through the judge points
    up to the newest of it, yielding (time, observations); lz.model_now carries the values
    between calls, lz.model_judged_ts the horizon."""
    if not chunks:
        return
    samples_ts = np.concatenate([c["sample_ts"] for c in chunks])
    product = np.concatenate([c["product_c"] for c in chunks])
    macro_ts = np.concatenate([c["macro_ts"] for c in chunks])
    budget = np.concatenate([c["budget_used_pct"] for c in chunks])
    days = np.concatenate([c["days_to_limit"] for c in chunks])
    newest = max(samples_ts[-1] if samples_ts.size else -math.inf, macro_ts[-1] if macro_ts.size else -math.inf)
    if not math.isfinite(newest):
        return
    if not math.isfinite(lz.model_judged_ts):
        lz.model_judged_ts = min(samples_ts[:1].tolist() + macro_ts[:1].tolist()) - 1e-3
    now = lz.model_now
    points = judge_points(lz.model_judged_ts, newest)
    ks = (np.searchsorted(samples_ts, points, side="right") - 1).tolist()  # the last sample at or before
    ms = (np.searchsorted(macro_ts, points, side="right") - 1).tolist()  # the last macro end at or before
    product_l, budget_l, days_l = product.tolist(), budget.tolist(), days.tolist()
    for at, k, m in zip(points, ks, ms):
        if k >= 0:
            now["product_c"] = _value(product_l[k])
        if m >= 0:
            now["budget_used_pct"], now["days_to_limit"] = _value(budget_l[m]), _value(days_l[m])
        lz.model_judged_ts = at
        yield at, dict(now)


def _value(x: float) -> float | None:
    return None if math.isnan(x) else x
