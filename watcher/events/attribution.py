"""What each event cost: excess crystal growth against the setpoint counterfactual. Pure.

For every event, the counterfactual is the same history with the air held at the zone's
setpoint while the event lasted. Both run through the one integrator, side by side as rows of
one call (rows never influence each other, so this is exact, not an approximation), and the
event's cost is the difference in settled mean diameter at the end of the window, which should
lie beyond the event's recovery tail (by default three times the slowest lag, when the product
has relaxed back; costs measured earlier are flagged unsettled). Costs of events close
together interact, so per-event costs need not add up to the zone's total excess; the
remainder is reported as unattributed.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from watcher.events.detect import Event
from watcher.model.integrator import Spec, State, advance, outputs, tile_state


@dataclass(frozen=True)
class EventCost:
    event: Event
    excess_um: float  # worst position, at the end of the window
    budget_share_pct: float  # the same difference as a share of the texture budget (persists)
    excess_by_position_um: dict[str, float]
    settled: bool  # False when the window ends before the event's recovery tail


def _without(events, t, air, t0_ts: float, setpoint_c: float, first_row: int) -> np.ndarray:
    """Air rows: row 0 as recorded, rows before first_row also as recorded (the caller edits
    them), then one row per event with the air held at the setpoint while the event lasted. A
    sample at t_k holds until t_{k+1}: every sample whose hold overlaps the event is replaced."""
    rows = np.repeat(air[None, :], first_row + len(events), axis=0)
    prev = np.concatenate(([t0_ts], t[:-1]))
    for k, e in enumerate(events, start=first_row):
        end = e.end_ts if e.end_ts is not None else t[-1]
        rows[k, (t > e.start_ts) & (prev < end)] = setpoint_c
    return rows


def _costs(spec: Spec, mean: np.ndarray, events, first_row: int, window_end_ts: float, tail_s: float):
    """Per-event costs from settled mean diameters (rows, P): row 0 against each event's row."""
    l0, lim = spec.profile.initial.mean_diameter_um, spec.profile.limit_mean_diameter_um
    span = lim**3 - l0**3
    costs = []
    for k, e in enumerate(events, start=first_row):
        diff = mean[0] - mean[k]
        share = 100.0 * (mean[0] ** 3 - mean[k] ** 3) / span
        worst = int(np.nanargmax(share))
        end = e.end_ts if e.end_ts is not None else window_end_ts
        costs.append(
            EventCost(
                e,
                float(diff[worst]),
                float(share[worst]),
                {p.name: float(d) for p, d in zip(spec.positions, diff)},
                bool(end + tail_s <= window_end_ts),
            )
        )
    return costs


@dataclass(frozen=True)
class DayGrowth:
    position: str  # the position with the most excess (the one reported)
    baseline_um: float  # growth over the day had the air held the setpoint all day
    excess_um: float  # recorded day against the all-setpoint day, at the window end
    by_cause_um: dict[str, float]  # summed event costs per kind
    unattributed_um: float
    costs: list[EventCost]
    end_state: State | None = None  # the recorded history's state at the day's end (starts the next day)


def day_growth(
    spec: Spec,
    start: State,
    time_ts,
    air_c,
    setpoint_c: float,
    day_start_ts: float,
    day_end_ts: float,
    events: list[Event],
) -> DayGrowth:
    """One day's growth split into the baseline at setpoint and the excess by cause.

    `start` lies at or before day_start_ts; the history runs past day_end_ts into the recovery
    tail. Rows: 0 as recorded; 1 with the air at the setpoint for the whole day; then one row per
    event of the day with only that event removed. The baseline is row 1's growth over the day;
    the excess and the event costs are compared at the end of the history.
    """
    t = np.asarray(time_ts, float)
    air = np.asarray(air_c, float)
    before, during = t <= day_start_ts, t > day_start_ts
    state = start
    if before.any():
        state, _ = advance(spec, start, t[before], air[None, before])
    mean_start = outputs(spec, state)["mean_diameter_um"][0]
    t, air = t[during], air[during]
    rows = _without(events, t, air, state.time_ts, setpoint_c, first_row=2)
    prev = np.concatenate(([state.time_ts], t[:-1]))
    rows[1, (t > day_start_ts) & (prev < day_end_ts)] = setpoint_c
    state = tile_state(state, rows.shape[0])
    first = t <= day_end_ts
    state, _ = advance(spec, state, t[first], rows[:, first])
    end_state = tile_state(state, 1, 0)
    mean_day_end = outputs(spec, state)["mean_diameter_um"]
    if (~first).any():
        state, _ = advance(spec, state, t[~first], rows[:, ~first])
    mean = outputs(spec, state)["mean_diameter_um"]
    excess = mean[0] - mean[1]
    worst = int(np.nanargmax(excess))
    costs = _costs(spec, np.delete(mean, 1, axis=0), events, 1, t[-1], 0.0)
    by_cause: dict[str, float] = {}
    for c in costs:
        by_cause[c.event.kind] = by_cause.get(c.event.kind, 0.0) + c.excess_by_position_um[spec.positions[worst].name]
    return DayGrowth(
        position=spec.positions[worst].name,
        baseline_um=float(mean_day_end[1, worst] - mean_start[worst]),
        excess_um=float(excess[worst]),
        by_cause_um=by_cause,
        unattributed_um=float(excess[worst] - sum(by_cause.values())),
        costs=costs,
        end_state=end_state,
    )


def default_tail_s(spec: Spec) -> float:
    taus = [p.tau_s for p in spec.positions if not p.probe]
    return 3.0 * max(taus) if taus else 3600.0


def attribute(
    spec: Spec, start: State, time_ts, air_c, setpoint_c: float, events: list[Event], tail_s: float | None = None
) -> tuple[list[EventCost], dict]:
    """Costs of `events` over the history (time_ts, air_c) that follows `start` (one zone).

    All rows are compared at the end of the window. Excess in um is what a microscope would
    see then; it slowly shrinks as crystals grow (the same ice spread on larger crystals), while
    the budget share, on L^3, persists. Returns the costs and a summary: total excess against
    holding the setpoint, the sum of event costs and the unattributed remainder.
    """
    t = np.asarray(time_ts, float)
    air = np.asarray(air_c, float)
    tail = default_tail_s(spec) if tail_s is None else tail_s
    air_rows = _without(events, t, air, start.time_ts, setpoint_c, first_row=1)
    state, _ = advance(spec, tile_state(start, len(events) + 1), t, air_rows)
    out = outputs(spec, state)
    costs = _costs(spec, out["mean_diameter_um"], events, 1, t[-1], tail)
    worst = int(np.nanargmax(out["excess_growth_um"][0]))
    total = float(out["excess_growth_um"][0, worst])
    attributed = float(sum(c.excess_by_position_um[spec.positions[worst].name] for c in costs))
    return costs, {
        "total_excess_um": total,
        "attributed_um": attributed,
        "unattributed_um": total - attributed,
        "position": spec.positions[worst].name,
    }
