"""The built-in demo site: invented data for a fictional cold store, for the demo only.

"Kestrel Point Frozen Distribution, Unit 4" has three zones with different regimes. The
series are synthetic (seeded, reproducible) and model nothing measured.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from watcher.files.series import Series

SITE_NAME = "Kestrel Point Frozen Distribution, Unit 4"
START_S = 1_793_491_200.0  # 2026-11-02T00:00:00Z, a Monday


@dataclass(frozen=True)
class DemoZone:
    zone_id: str
    name: str
    setpoint_c: float
    regime: str
    series: Series


def _defrosts(t_s: np.ndarray, per_day: int, minutes: float, rise_k: float, offset_h: float = 0.0) -> np.ndarray:
    """Air rise during defrost: a ramp up over the defrost, then recovery over as long again."""
    period = 86400.0 / per_day
    phase = (t_s - START_S - offset_h * 3600.0) % period
    dur = minutes * 60.0
    up = np.clip(phase / dur, 0.0, 1.0) * (phase < dur)
    down = np.clip(1.0 - (phase - dur) / dur, 0.0, 1.0) * ((phase >= dur) & (phase < 2 * dur))
    return rise_k * (up + down)


def build(days: float = 14.0, step_s: float = 60.0, seed: int = 7) -> list[DemoZone]:
    rng = np.random.default_rng(seed)
    t = START_S + np.arange(0.0, days * 86400.0, step_s)
    hour = ((t - START_S) / 3600.0) % 24.0
    day = (t - START_S) / 86400.0

    def noisy(x):
        return np.round(x + rng.normal(0.0, 0.15, x.size), 2)

    hardening = -30.0 + _defrosts(t, 1, 20, 3.0, offset_h=2.0)
    bulk = -25.0 + _defrosts(t, 4, 30, 6.0)
    dispatch = -22.0 + _defrosts(t, 3, 25, 5.0, offset_h=1.0)
    # Door openings during the working day (06-18 h): a rise that decays in about 10 minutes.
    working = (hour >= 6) & (hour < 18) & (((t - START_S) // 86400) % 7 < 6)
    opens = working & (rng.random(t.size) < step_s / 900.0)
    door = np.zeros(t.size)
    level = 0.0
    for i in range(t.size):
        level = level * np.exp(-step_s / 600.0) + (rng.uniform(3.0, 7.0) if opens[i] else 0.0)
        door[i] = level
    dispatch = dispatch + np.minimum(door, 9.0)
    # One refrigeration fault on day 9: a compressor trip, 6 h of warming, then recovery.
    fault = (day >= 9.25) & (day < 9.5)
    rise = np.where(fault, (day - 9.25) / 0.25 * 12.0, 0.0)
    after = (day >= 9.5) & (day < 9.6)
    rise = rise + np.where(after, 12.0 * (1.0 - (day - 9.5) / 0.1), 0.0)
    dispatch = dispatch + rise
    return [
        DemoZone(
            "hardening", "Hardening room", -30.0, "cold, one short defrost a day", Series(t, noisy(hardening), None)
        ),
        DemoZone("bulk-a", "Bulk store A", -25.0, "four defrosts a day", Series(t, noisy(bulk), None)),
        DemoZone(
            "dispatch",
            "Dispatch freezer",
            -22.0,
            "busy doors and one refrigeration fault",
            Series(t, noisy(dispatch), None),
        ),
    ]
