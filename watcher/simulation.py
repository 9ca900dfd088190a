"""Run a recorded temperature series through the model and shape the result for people.

Between the pure model and the CLI: no file I/O here, only plain dicts that the CLI prints
as a table or as JSON.
"""

from __future__ import annotations

import math

import numpy as np

from watcher import MODEL_VERSION
from watcher.caution import CAUTION as _CAUTION
from watcher.files.series import Series
from watcher.model.additive import additive_budget_pct
from watcher.model.integrator import DEFAULT_POSITIONS, Position, Spec, advance, new_state, outputs
from watcher.model.profiles import Profile
from watcher.ranges import RANGE_KEYS

CAUTION = _CAUTION + " Calibrate the profile with your own trial."
FIGURES = (
    "mean_diameter_um",
    "d90_um",
    "share_above_limit",
    "budget_used_pct",
    "growth_rate_um_per_day",
    "days_to_limit",
    "excess_growth_um",
    "product_c",
)
FIGURES = FIGURES + RANGE_KEYS


def _clean(value: float) -> float | None:
    """JSON has no NaN or infinity: an undefined or unbounded figure becomes null."""
    value = float(value)
    return value if math.isfinite(value) else None


def position_rows(spec: Spec, out: dict, zone: int = 0) -> dict[str, dict]:
    rows = {}
    for i, pos in enumerate(spec.positions):
        row = {k: _clean(out[k][zone, i]) for k in FIGURES}
        row["state"] = "thawed" if out["thawed"][zone, i] else "frozen"
        rows[pos.name] = row
    return rows


def worst_position(rows: dict[str, dict]) -> str:
    """The position that has used most budget; a thawed one is worst of all."""

    def rank(item):
        _, row = item
        return (row["state"] == "thawed", row["budget_used_pct"] if row["budget_used_pct"] is not None else -math.inf)

    return max(rows.items(), key=rank)[0]


def simulate(
    profile: Profile,
    series: Series,
    setpoint_c: float | None = None,
    positions: tuple[Position, ...] = DEFAULT_POSITIONS,
) -> dict:
    """Integrate one zone's series; return per-position figures and the worst case."""
    if series.product_c is not None and not any(p.probe for p in positions):
        positions = positions + (Position("probe", 0.0, probe=True),)
    spec = Spec(profile, positions)
    setpoint = float(np.median(series.air_c)) if setpoint_c is None else float(setpoint_c)
    probe = series.product_c
    state = new_state(spec, series.time_ts[0], series.air_c[0], setpoint, None if probe is None else probe[0])
    state, _ = advance(
        spec, state, series.time_ts[1:], series.air_c[None, 1:], None if probe is None else probe[None, 1:]
    )
    rows = position_rows(spec, outputs(spec, state))
    rule = additive_budget_pct(spec, series.time_ts, series.air_c[None, :])[0]
    for row, pct in zip(rows.values(), rule):
        row["additive_rule_budget_pct"] = _clean(pct)
    worst = worst_position(rows)
    result = {
        k: rows[worst][k]
        for k in ("mean_diameter_um", "d90_um", "budget_used_pct", "days_to_limit", "excess_growth_um")
        + RANGE_KEYS
        + ("additive_rule_budget_pct",)
    }
    result.update(
        worst_position=worst,
        positions=rows,
        profile=profile.name,
        setpoint_c=setpoint,
        samples=int(series.time_ts.size),
        start_ts=float(series.time_ts[0]),
        end_ts=float(series.time_ts[-1]),
        limit_mean_diameter_um=profile.limit_mean_diameter_um,
        model_version=MODEL_VERSION,
        caution=CAUTION,
    )
    return result
