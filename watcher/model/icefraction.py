"""Equilibrium ice mass fraction of a frozen food versus temperature.

Ideal freezing-point-depression form as given in the ASHRAE Handbook - Refrigeration,
"Thermal Properties of Foods" (Miles / Schwartzberg; notation from memory):

    x_ice = (x_wo - x_b) * (1 - t_f / t)    for t < t_f (degC), else 0

x_wo is the total water mass fraction, x_b the bound (unfreezable) water and t_f the initial
freezing point. The form over-predicts the frozen share for sugar-rich mixes, so the three
numbers belong to the product profile, not to the code.
"""

from __future__ import annotations

import numpy as np


def ice_fraction(temp_c, water_fraction: float, bound_water_fraction: float, freezing_point_c: float):
    """Ice mass fraction at temp_c; zero at or above the initial freezing point."""
    t = np.asarray(temp_c, dtype=float)
    frozen = t < freezing_point_c
    # Guard the division where t >= t_f (including t = 0): those entries are zeroed below.
    safe_t = np.where(frozen, t, -1.0)
    x = (water_fraction - bound_water_fraction) * (1.0 - freezing_point_c / safe_t)
    return np.where(frozen, x, 0.0)
