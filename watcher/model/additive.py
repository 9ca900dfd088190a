"""The additive time-temperature-tolerance rule, beside the model.

The classic rule for frozen-food storage life (Van Arsdel, Copley & Olson 1969 [from memory]):
each interval at temperature T uses dt / life(T) of the product's life, and the shares add up,
in any order. Here life(T) is the profile's own constant-storage life, so on constant storage
the rule and the model agree exactly; under cycling the model adds what the rule cannot see
(melt-refreeze, and the ice-content changes of warm spells). Pure: numpy only.

With life(T) = theta_lim / a_d(T), the rule's share of life is the reduced time accumulated
at the product temperature over the reduced time from the initial size to the limit. It is
shown as the budget that share means on constant storage (read off the profile's isothermal
curve), so that the two figures are on one scale and agree exactly on constant storage.
"""

from __future__ import annotations

import numpy as np

from watcher.model import population as pop
from watcher.model.thermal import lag_series


def budget_pct_after(spec, reduced_um3) -> np.ndarray:
    """Budget (%) on constant storage after a reduced time (um^3) from the initial size."""
    ini = spec.profile.initial
    lim_ratio = spec.profile.limit_mean_diameter_um / ini.mean_diameter_um
    x = pop.ratio_at(spec.master, np.asarray(reduced_um3, dtype=float) / ini.mean_diameter_um**3)
    return 100.0 * (x**3 - 1.0) / (lim_ratio**3 - 1.0)


def reduced_um3_for_budget(spec, budget_pct) -> np.ndarray:
    """The inverse of ``budget_pct_after``."""
    ini = spec.profile.initial
    lim_ratio = spec.profile.limit_mean_diameter_um / ini.mean_diameter_um
    frac = np.maximum(np.asarray(budget_pct, dtype=float), 0.0) / 100.0
    x = np.cbrt(1.0 + frac * (lim_ratio**3 - 1.0))
    return pop.reduced_time_to(spec.master, x) * ini.mean_diameter_um**3


def additive_budget_pct(spec, time_ts, air_c, product0_c=None, start_budget_pct=0.0) -> np.ndarray:
    """Budget (%) by the additive rule after air rows air_c (Z, K) sampled at time_ts (K,), per zone
    row and exposure position (Z, P), starting from start_budget_pct: the product follows the
    air with each position's lag (probe positions follow the air), from product0_c (Z, P) or
    the first air value. Air is held from one sample to the next, as in the integrator."""
    t = np.asarray(time_ts, dtype=float)
    air = np.atleast_2d(np.asarray(air_c, dtype=float))
    z = air.shape[0]
    dt = np.diff(t)
    held = air[:, :-1]
    out = np.zeros((z, len(spec.positions)))
    for i, pos in enumerate(spec.positions):
        if pos.probe:
            theta = (spec.rate_um3_per_s(held) * dt).sum(axis=1)
        else:
            p0 = air[:, 0] if product0_c is None else np.asarray(product0_c, dtype=float)[:, i]
            path = lag_series(p0, held, dt, pos.tau_s)
            mid = held + (path[:, :-1] - held) * np.exp(-0.5 * dt / pos.tau_s)
            rate = spec.rate_um3_per_s
            theta = (dt / 6.0 * (rate(path[:, :-1]) + 4.0 * rate(mid) + rate(path[:, 1:]))).sum(axis=1)
        out[:, i] = theta
    return budget_pct_after(spec, reduced_um3_for_budget(spec, start_budget_pct) + out)
