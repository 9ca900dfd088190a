"""Lifshitz-Slyozov-Wagner theory: the self-similar size distribution and its moments.

The LSW limit distribution of rho = r / r_mean (Lifshitz & Slyozov 1961; Wagner 1961; formula
as recalled in the domain brief, from memory):

    P(rho) = (4/9) rho^2 (3/(3+rho))^(7/3) (1.5/(1.5-rho))^(11/3) exp(-rho/(1.5-rho)),
    0 <= rho < 1.5, and zero beyond.

It is used to seed populations that start on the asymptote and as a check of the classes.
"""

from __future__ import annotations

import numpy as np

RHO_MAX = 1.5


def lsw_pdf(rho):
    """The LSW probability density of rho = r / r_mean."""
    rho = np.asarray(rho, dtype=float)
    inside = (rho >= 0.0) & (rho < RHO_MAX)
    r = np.where(inside, rho, 0.0)
    gap = RHO_MAX - r
    value = (4.0 / 9.0) * r**2 * (3.0 / (3.0 + r)) ** (7.0 / 3.0) * (RHO_MAX / gap) ** (11.0 / 3.0) * np.exp(-r / gap)
    return np.where(inside, value, 0.0)


def lsw_moments(n_points: int = 200_001) -> dict[str, float]:
    """Integral, mean, standard deviation, mode and third moment of the LSW density."""
    rho = np.linspace(0.0, RHO_MAX, n_points)
    p = lsw_pdf(rho)
    total = np.trapezoid(p, rho)
    mean = np.trapezoid(rho * p, rho) / total
    var = np.trapezoid((rho - mean) ** 2 * p, rho) / total
    return {
        "integral": float(total),
        "mean": float(mean),
        "std": float(np.sqrt(var)),
        "mode": float(rho[np.argmax(p)]),
        "third_moment": float(np.trapezoid(rho**3 * p, rho) / total),
        "mass_above_max": float(1.0 - total),
    }
