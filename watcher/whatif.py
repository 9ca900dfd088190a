"""What an operating change would have done to one zone's recorded period. Pure (numpy only).

The recorded air (one-minute bins) and the zone's stored events are edited by the change, then
the recorded and the changed histories run side by side through the model from the same start
state, each with rows that hold the air at the setpoint during one kind of event (defrosts,
doors, excursions) so the excess growth is split by cause the same way for both.

Edits (all of them can only lower the air, except a defrost schedule with a warmer peak):
- setpoint offset: the whole trace moves by the offset (the room runs that much colder or warmer);
- defrost schedule: the recorded defrosts are taken out (air held at the setpoint while they
  ran) and N evenly spaced defrosts a day are put in, each a rise to the given peak and back;
- door practice: the rise of each opening above the setpoint is scaled by a factor (a strip
  curtain cuts infiltration by about 93 %, an air curtain by 75-80 % [pub: Pham & Oliver 1983]),
  or a share of the openings is taken out (evenly spread over the period);
- removing recorded events by id (an excursion that a repair would have prevented).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from watcher.model.additive import additive_budget_pct
from watcher.model.integrator import Spec, State, advance, outputs, tile_state

CAUSES = ("defrost", "door", "excursion")
ROWS_PER_CASE = 2 + len(CAUSES)  # as given, all at setpoint, then without each cause


@dataclass(frozen=True)
class Change:
    setpoint_offset_k: float = 0.0
    defrosts_per_day: int | None = None
    defrost_min: float = 30.0
    defrost_peak_c: float | None = None  # air at the top of each scheduled defrost; None: setpoint + 6 K
    door_factor: float = 1.0
    fewer_doors_pct: float = 0.0
    drop_event_ids: tuple[int, ...] = field(default_factory=tuple)

    def describe(self) -> str:
        parts = []
        if self.setpoint_offset_k:
            parts.append(f"setpoint {self.setpoint_offset_k:+g} K")
        if self.defrosts_per_day is not None:
            peak = "setpoint + 6 K" if self.defrost_peak_c is None else f"{self.defrost_peak_c:g} C"
            parts.append(f"{self.defrosts_per_day} defrosts a day of {self.defrost_min:g} min to {peak}")
        if self.door_factor != 1.0:
            parts.append(f"door rise x{self.door_factor:g}")
        if self.fewer_doors_pct:
            parts.append(f"{self.fewer_doors_pct:g} % fewer door openings")
        if self.drop_event_ids:
            parts.append("without event " + ", ".join(str(i) for i in self.drop_event_ids))
        return "; ".join(parts) or "no change"


def _window(t: np.ndarray, start_ts: float, end_ts: float) -> np.ndarray:
    return (t > start_ts) & (t <= end_ts)


def changed_air(t: np.ndarray, air: np.ndarray, setpoint_c: float, events: list[dict], change: Change) -> np.ndarray:
    """The recorded air with the change applied. Events: dicts with id, kind, start_ts, end_ts."""
    out = air.astype(float).copy()
    end_of = lambda e: e["end_ts"] if e["end_ts"] is not None else t[-1]  # noqa: E731
    for e in events:
        if e["id"] in change.drop_event_ids:
            w = _window(t, e["start_ts"], end_of(e))
            out[w] = np.minimum(out[w], setpoint_c)
    doors = [e for e in events if e["kind"] == "door"]
    if change.fewer_doors_pct:
        p = change.fewer_doors_pct / 100.0
        for i, e in enumerate(doors):
            if np.floor((i + 1) * p) > np.floor(i * p):  # evenly spread: every 1/p-th opening
                w = _window(t, e["start_ts"], end_of(e))
                out[w] = np.minimum(out[w], setpoint_c)
    if change.door_factor != 1.0:
        for e in doors:
            w = _window(t, e["start_ts"], end_of(e))
            rise = np.maximum(out[w] - setpoint_c, 0.0)
            out[w] = np.where(rise > 0, setpoint_c + change.door_factor * rise, out[w])
    if change.defrosts_per_day is not None:
        for e in events:
            if e["kind"] == "defrost":
                w = _window(t, e["start_ts"], end_of(e))
                out[w] = np.minimum(out[w], setpoint_c)
        out = np.maximum(out, _schedule(t, setpoint_c, change))
    return out + change.setpoint_offset_k


def _schedule(t: np.ndarray, setpoint_c: float, change: Change) -> np.ndarray:
    """Triangular defrost rises, evenly spaced from the start of the period."""
    n = change.defrosts_per_day or 0
    if n <= 0 or t.size == 0:
        return np.full(t.shape, -np.inf)
    period = 86400.0 / n
    half = change.defrost_min * 30.0  # half the duration, s
    peak = setpoint_c + 6.0 if change.defrost_peak_c is None else change.defrost_peak_c
    phase = np.mod(t - t[0], period)
    into = np.minimum(phase, 2 * half - phase) if half > 0 else np.zeros_like(phase)
    return np.where(phase < 2 * half, setpoint_c + (peak - setpoint_c) * np.clip(into / max(half, 1e-9), 0, 1), -np.inf)


def _scheduled_events(t: np.ndarray, change: Change) -> list[dict]:
    n = change.defrosts_per_day or 0
    if n <= 0 or t.size == 0:
        return []
    period, length = 86400.0 / n, change.defrost_min * 60.0
    starts = t[0] + period * np.arange(int(np.ceil((t[-1] - t[0]) / period)) + 1)
    return [{"id": -1 - i, "kind": "defrost", "start_ts": s, "end_ts": s + length} for i, s in enumerate(starts)]


def _rows(t, air, setpoint_c, events) -> np.ndarray:
    """As given; all at setpoint; then without each cause (air held at the setpoint)."""
    rows = [air, np.full_like(air, setpoint_c)]
    for cause in CAUSES:
        r = air.copy()
        for e in events:
            if e["kind"] == cause:
                w = _window(t, e["start_ts"], e["end_ts"] if e["end_ts"] is not None else t[-1])
                r[w] = np.minimum(r[w], setpoint_c)
        rows.append(r)
    return np.vstack(rows)


def compare(
    spec: Spec, start: State, t: np.ndarray, air: np.ndarray, setpoint_c: float, events: list[dict], change: Change
) -> dict:
    """Figures for the period as recorded and as changed, and the hourly budget traces."""
    new_air = changed_air(t, air, setpoint_c, events, change)
    new_setpoint = setpoint_c + change.setpoint_offset_k
    kept = [e for e in events if e["id"] not in change.drop_event_ids]
    if change.defrosts_per_day is not None:
        kept = [e for e in kept if e["kind"] != "defrost"] + _scheduled_events(t, change)
    rows = np.vstack([_rows(t, air, setpoint_c, events), _rows(t, new_air, new_setpoint, kept)])
    # Both cases are measured the same way: the melted ice counted as refrozen at the recorded
    # setpoint (at a colder one more ice would count, and the crystals would look larger).
    state = tile_state(start, rows.shape[0])
    end, trace = advance(spec, state, t, rows, trace=True)
    out = outputs(spec, end)
    days = (t[-1] - start.time_ts) / 86400.0
    l0, lim = spec.profile.initial.mean_diameter_um, spec.profile.limit_mean_diameter_um
    span = lim**3 - l0**3
    start_out = outputs(spec, start)
    start_budget = float(np.nanmax(start_out["budget_used_pct"][0]))
    start_mean = start_out["mean_diameter_um"][0]  # settled, per position
    rule = additive_budget_pct(
        spec,
        np.concatenate(([start.time_ts], t)),
        np.vstack([np.concatenate(([start.air_c[0]], r)) for r in (air, new_air)]),
        np.repeat(start.product_c[:1], 2, axis=0),
        start_budget,
    )

    def case(k: int) -> dict:
        budget = out["budget_used_pct"][k]
        worst = int(np.nanargmax(budget))
        mean = out["mean_diameter_um"]

        def share(j):  # budget share (L^3) of what row j took away, at the worst position
            # Never below 0: taking a cause away can leave the number-mean a hair larger (small
            # crystals that would have dissolved survive); that is no saving to report.
            return max(0.0, round(float(100.0 * (mean[k, worst] ** 3 - mean[j, worst] ** 3) / span), 4))

        used = float(budget[worst])
        return {
            "budget_used_start_pct": round(start_budget, 3),
            "budget_used_end_pct": round(used, 3),
            "budget_per_30_days_pct": round((used - start_budget) / days * 30.0, 3) if days > 0 else None,
            "days_to_limit_end": None
            if np.isnan(out["days_to_limit"][k, worst])
            else round(float(out["days_to_limit"][k, worst]), 1),
            "mean_diameter_end_um": round(float(mean[k, worst]), 3),
            # Mean against mean: the start budget is a running maximum, the row's end is not.
            "baseline_growth_pct": round(float(100.0 * (mean[k + 1, worst] ** 3 - start_mean[worst] ** 3) / span), 3),
            "excess_pct": {cause: share(k + 2 + i) for i, cause in enumerate(CAUSES)},
            "additive_rule_end_pct": round(float(rule[k // ROWS_PER_CASE, worst]), 3),
            "worst_position": spec.positions[worst].name,
        }

    recorded, changed = case(0), case(ROWS_PER_CASE)
    return {
        "period_days": round(days, 3),
        # The 30-day rate is this period's rate carried on: say so when the period is shorter.
        "per_30_days_extrapolated": bool(days < 30.0),
        "change": change.describe(),
        "recorded": recorded,
        "changed": changed,
        "trace_ts": trace.time_ts.tolist(),
        "trace_recorded_pct": (100.0 * np.nanmax(trace.budget_fraction[:, 0, :-1], axis=1)).tolist(),
        "trace_changed_pct": (100.0 * np.nanmax(trace.budget_fraction[:, ROWS_PER_CASE, :-1], axis=1)).tolist(),
        "air_recorded_c": air,
        "air_changed_c": new_air,
    }
