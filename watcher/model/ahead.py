"""Figures read ahead from a crystal size: growth rate, days to the limit and their 90 %
ranges (``ahead_of``), for a state (integrator.outputs) or along a Trace (``trace_figures``:
what the alert rules judge). `spec` is an integrator.Spec and `trace` an integrator.Trace (not
imported: the integrator imports this module). Pure: numpy only."""

from __future__ import annotations

import numpy as np

from watcher.model import population as pop

SECONDS_PER_DAY = 86400.0


def ahead_of(spec, mean_um: np.ndarray, product_c: np.ndarray) -> dict[str, np.ndarray]:
    """Growth rate (um/day), days to the limit if each product temperature held, and the 90 %
    range of the days and of the budget from the profile's rate factor f.

    Read off the profile's isothermal master curve at the current settled size: the model's
    own prediction at constant temperature, including the faster start of a broad size
    distribution (the LSW transient), without re-running the population. For the range, the
    history so far is read as the reduced time that reaches the current size; a rate f times
    higher would have covered f times that reduced time and would cover the rest f times
    faster (and the same for 1/f).
    """
    l0 = spec.profile.initial.mean_diameter_um
    lim = spec.profile.limit_mean_diameter_um
    master = spec.master
    f = spec.profile.kinetics.rate_factor_90
    x = np.maximum(mean_um / l0, 1.0)
    th_x = pop.reduced_time_to(master, x)
    th_lim = float(pop.reduced_time_to(master, lim / l0))
    a_day = spec.rate_um3_per_s(product_c) * SECONDS_PER_DAY / l0**3  # reduced time per day
    with np.errstate(invalid="ignore", divide="ignore"):
        x_next = x * 1.1 ** (1.0 / 3.0)  # L^3 up by 10 %: smooths the cells' wobble in the local slope
        growth = np.where(a_day > 0, (x_next - x) * l0 * a_day / (pop.reduced_time_to(master, x_next) - th_x), 0.0)

        def days(scale):
            left = np.maximum(th_lim - scale * th_x, 0.0)
            return np.where(a_day > 0, left / (scale * a_day), np.inf)

        def budget(scale):
            m = pop.ratio_at(master, scale * th_x)
            return 100.0 * (m**3 - 1.0) / ((lim / l0) ** 3 - 1.0)

        done = mean_um >= lim
        return {
            "growth": growth,
            "days": np.where(done, 0.0, days(1.0)),
            "days_low": np.where(done, 0.0, days(f)),
            "days_high": np.where(done, 0.0, days(1.0 / f)),
            "budget_low": budget(1.0 / f),
            "budget_high": budget(f),
        }


def trace_figures(spec, trace, zone: int = 0) -> dict[str, np.ndarray]:
    """What one zone's rules judge along a Trace: at each macro end (time_ts), the budget used
    (%) of the position that has used most and the cautious end of the days to the limit of
    the most pressed position; at each sample (sample_ts), the warmest position's product
    temperature. Arrays of shape (T,) and (K,)."""
    n_pos = len(spec.positions)
    if trace.time_ts.size:
        mean = trace.mean_diameter_um[:, zone, :n_pos]
        ahead = ahead_of(spec, mean, trace.product_c[:, zone, :])
        days = np.fmin.reduce(np.fmin(ahead["days"], ahead["days_low"]), axis=1)  # NaN (thawed) skipped
        budget = 100.0 * np.fmax.reduce(np.maximum(trace.budget_fraction[:, zone, :n_pos], 0.0), axis=1)
    else:
        days = budget = np.empty(0)
    product = np.fmax.reduce(trace.sample_product_c[:, zone, :], axis=1) if trace.sample_ts.size else np.empty(0)
    return {"budget_used_pct": budget, "days_to_limit": days, "product_c": product}
