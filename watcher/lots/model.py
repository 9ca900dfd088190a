"""A lot's own crystal population: its starting state and its figures. Pure (numpy, no I/O).

A lot is integrated by the same model as a zone (watcher.model.integrator), on its own state,
with the air of whichever zone it sits in, through two exposure positions (pallet surface and
core). Lots in one zone see the same air but keep their own populations, so a lot that arrived
half-used stays ahead of a fresh one.

Starting states:
- "fresh": the profile's initial distribution (product straight from hardening);
- "mean_diameter_um": that mean crystal size, the distribution's shape kept;
- "budget_used_pct": the size at which that share of the texture budget is used;
- "history": a product temperature history replayed from a fresh start up to the arrival.
"""

from __future__ import annotations

import math

import numpy as np

from watcher.errors import InputError
from watcher.model.integrator import DEFAULT_POSITIONS, Spec, State, advance, new_state, outputs

MAX_HISTORY_POINTS = 20_000


def lot_spec(profile) -> Spec:
    return Spec(profile, DEFAULT_POSITIONS)


def _budget_size_um(spec: Spec, fraction: float) -> float:
    """Mean diameter at which `fraction` of the budget is used (inverse of the integrator's
    L^3 budget: (L^3 - L0^3) / (Llim^3 - L0^3))."""
    l0 = spec.profile.initial.mean_diameter_um
    lim = spec.profile.limit_mean_diameter_um
    return (l0**3 + fraction * (lim**3 - l0**3)) ** (1.0 / 3.0)


def _scaled(spec: Spec, state: State, mean_um: float) -> State:
    """The same distribution shape at another mean diameter: cells scaled in u = d^3, and the
    number of crystals divided by the same factor so the ice volume stays the same."""
    now = float(np.nanmax(outputs(spec, state)["mean_diameter_um"]))
    st = state.copy()
    factor = (mean_um / now) ** 3
    st.ub = st.ub * factor
    st.nc = st.nc / factor
    l0 = spec.profile.initial.mean_diameter_um
    lim = spec.profile.limit_mean_diameter_um
    st.peak_budget[:] = max(0.0, (mean_um**3 - l0**3) / (lim**3 - l0**3))
    return st


def start_state(spec: Spec, t0_ts: float, air0_c: float, setpoint_c: float, initial: dict) -> State:
    """The lot's state at its arrival (t0_ts) in a zone whose air is air0_c."""
    kind = initial.get("kind", "fresh")
    if kind == "fresh":
        return new_state(spec, t0_ts, air0_c, setpoint_c)
    if kind == "mean_diameter_um":
        return _scaled(spec, new_state(spec, t0_ts, air0_c, setpoint_c), float(initial["value"]))
    if kind == "budget_used_pct":
        size = _budget_size_um(spec, float(initial["value"]) / 100.0)
        return _scaled(spec, new_state(spec, t0_ts, air0_c, setpoint_c), size)
    if kind == "history":
        t = np.array([p[0] for p in initial["points"]], dtype=float)
        c = np.array([p[1] for p in initial["points"]], dtype=float)
        keep = t < t0_ts
        t, c = t[keep], c[keep]
        if t.size == 0:
            return new_state(spec, t0_ts, air0_c, setpoint_c)
        st = new_state(spec, t[0], c[0], setpoint_c)
        # The history's last value is held until the arrival, where the lot enters the zone.
        st, _ = advance(spec, st, np.append(t[1:], t0_ts), np.append(c[1:], air0_c)[None, :])
        return st
    raise InputError("lot initial state", kind, "fresh, mean_diameter_um, budget_used_pct or history")


def lot_figures(spec: Spec, state: State) -> dict:
    """The lot's figures at state.time_ts, worst position first: budget used, mean crystal size,
    days to the limit at current conditions, product temperature."""
    out = outputs(spec, state)
    budget = out["budget_used_pct"][0]
    worst = int(np.nanargmax(budget)) if np.isfinite(budget).any() else 0

    def value(key):
        v = float(out[key][0][worst])
        return None if math.isnan(v) else round(v, 6)

    def soonest(key):
        days = out[key][0]
        finite = days[np.isfinite(days)]
        return round(float(finite.min()), 3) if finite.size else None

    return {
        "time_ts": state.time_ts,
        "worst_position": spec.positions[worst].name,
        "budget_used_pct": value("budget_used_pct"),
        "budget_used_pct_low": value("budget_used_pct_low"),
        "budget_used_pct_high": value("budget_used_pct_high"),
        "mean_diameter_um": value("mean_diameter_um"),
        "days_to_limit": soonest("days_to_limit"),
        "days_to_limit_low": soonest("days_to_limit_low"),
        "days_to_limit_high": soonest("days_to_limit_high"),
        "product_c": value("product_c"),
        "thawed": bool(out["thawed"][0].any()),
    }


def parse_initial(raw, where: str) -> dict:
    """Validate a lot's declared starting state (from MQTT, the CLI or a CSV row)."""
    if raw is None or raw == "fresh" or raw == {"kind": "fresh"}:
        return {"kind": "fresh"}
    if not isinstance(raw, dict) or len(raw) != 1:
        raise InputError(
            f"{where}: initial",
            str(raw)[:60],
            '"fresh", {"mean_diameter_um": X}, {"budget_used_pct": X} or {"history": [[time, temp_c], ...]}',
        )
    ((kind, value),) = raw.items()
    if kind == "mean_diameter_um":
        if not _number(value) or not 1.0 <= value <= 500.0:
            raise InputError(f"{where}: mean_diameter_um", value, "a number of micrometres in [1, 500]")
        return {"kind": kind, "value": float(value)}
    if kind == "budget_used_pct":
        if not _number(value) or not 0.0 <= value <= 200.0:
            raise InputError(f"{where}: budget_used_pct", value, "a percentage in [0, 200]")
        return {"kind": kind, "value": float(value)}
    if kind == "history":
        if not isinstance(value, list) or not 2 <= len(value) <= MAX_HISTORY_POINTS:
            raise InputError(f"{where}: history", str(value)[:40], f"2 to {MAX_HISTORY_POINTS} [time, temp_c] points")
        points = []
        for i, p in enumerate(value):
            if not (isinstance(p, list) and len(p) == 2 and _number(p[0]) and _number(p[1]) and -60 <= p[1] <= 40):
                raise InputError(f"{where}: history point {i}", str(p)[:40], "[epoch seconds, temp_c in -60..40]")
            if points and p[0] <= points[-1][0]:
                raise InputError(f"{where}: history point {i}", p[0], "a time later than the point before")
            points.append((float(p[0]), float(p[1])))
        return {"kind": kind, "points": points}
    raise InputError(f"{where}: initial", kind, "mean_diameter_um, budget_used_pct or history")


def _number(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)
