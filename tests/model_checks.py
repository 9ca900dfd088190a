"""Helpers for level checks of the model: run the integrator at constant temperature and read
when the texture limit is reached (the product held as a probe would read it)."""

from __future__ import annotations

import numpy as np

from watcher.model.integrator import Position, Spec, advance, new_state

DAY_S = 86400.0


def days_to_limit_at(profile, temp_c: float, max_days: float = 20_000.0, macro_days: float = 1.0) -> float:
    """Days until the mean diameter reaches the profile's limit at constant temp_c, by the
    integrator (daily population steps, which constant storage allows); inf if never."""
    spec = Spec(profile, (Position("probe", probe=True),), macro_s=macro_days * DAY_S)
    state = new_state(spec, 0.0, temp_c, temp_c, temp_c)
    t = np.arange(1.0, max_days + 1.0) * macro_days * DAY_S
    chunk = 2000
    prev_t, prev_b = 0.0, 0.0
    for lo in range(0, t.size, chunk):
        tt = t[lo : lo + chunk]
        temps = np.full((1, tt.size), float(temp_c))
        state, trace = advance(spec, state, tt, temps, temps, trace=True)
        b = trace.budget_fraction[:, 0, 0]
        hit = np.flatnonzero(b >= 1.0)
        if hit.size:
            k = hit[0]
            t0, b0 = (prev_t, prev_b) if k == 0 else (trace.time_ts[k - 1], b[k - 1])
            return float((t0 + (1.0 - b0) / (b[k] - b0) * (trace.time_ts[k] - t0)) / DAY_S)
        prev_t, prev_b = float(trace.time_ts[-1]), float(b[-1])
    return float("inf")
