"""Coarsening rate versus temperature.

The profile gives K_ref, the cube-law rate of the mean diameter (L^3 - L0^3 = K t) in
um^3/day at a reference temperature. K(T) scales it by either

* Arrhenius: K(T) = K_ref * exp(-Ea/R * (1/T - 1/T_ref)), T in kelvin; or
* WLF: K(T) = K_ref * 10**(log10 aT(T_ref) - log10 aT(T)) with
  log10 aT = -C1 (T - Tg') / (C2 + T - Tg'), valid from Tg' to Tg' + 50 K
  (Williams, Landel & Ferry 1955; IUPAC Gold Book).

Below Tg' (the glass transition of the freeze-concentrated matrix) coarsening is taken as
negligible and the rate is exactly zero for both forms. A linear taper over the first
TG_TAPER_K above Tg' joins the rate to zero, so it stays continuous in temperature: a hard cut
would let rounding noise at Tg' switch a finite rate on and off. Above the initial freezing point the
product is thawed; the rate is held at its value at the freezing point and the population
model reports the thaw instead.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

R_J_PER_MOL_K = 8.314462618
ZERO_C_IN_K = 273.15
WLF_VALID_SPAN_K = 50.0
#: d = 2r turns dr/dt = (a/r)(1/r* - 1/r) into the same form in diameter with a_d = 8a, and the
#: LSW asymptote K = (4/9) a_d for the mean diameter [derived from Tadros eq. 10.64, x8 for d=2r].
LSW_A_OVER_K = 9.0 / 4.0
TG_TAPER_K = 2.0


@dataclass(frozen=True)
class Kinetics:
    """Temperature dependence of the cube-law rate constant."""

    form: str  # "arrhenius" or "wlf"
    k_ref_um3_per_day: float
    ref_temp_c: float
    tg_prime_c: float
    activation_energy_kj_per_mol: float = 0.0
    wlf_c1: float = 17.44
    wlf_c2_k: float = 51.6
    #: 90 % range of K: K / f .. K x f (calibration covariance, or the spread stated with a
    #: declared life). Ranges on budget and days left come from it.
    rate_factor_90: float = 2.2


def wlf_log10_shift(temp_c, tg_prime_c: float, c1: float = 17.44, c2_k: float = 51.6):
    """log10 aT of the WLF equation (relaxation time at T over that at Tg')."""
    x = np.asarray(temp_c, dtype=float) - tg_prime_c
    return -c1 * x / (c2_k + x)


def rate_um3_per_day(kin: Kinetics, temp_c, freezing_point_c: float):
    """K(T) in um^3/day: zero below Tg', held at the freezing point above it."""
    t = np.minimum(np.asarray(temp_c, dtype=float), freezing_point_c)
    if kin.form == "wlf":
        log_ratio = wlf_log10_shift(kin.ref_temp_c, kin.tg_prime_c, kin.wlf_c1, kin.wlf_c2_k)
        # Evaluate only inside the validity range; below Tg' the where() sets zero anyway.
        t_valid = np.maximum(t, kin.tg_prime_c)
        log_ratio = log_ratio - wlf_log10_shift(t_valid, kin.tg_prime_c, kin.wlf_c1, kin.wlf_c2_k)
        k = kin.k_ref_um3_per_day * np.power(10.0, log_ratio)
    else:
        ea_j = kin.activation_energy_kj_per_mol * 1000.0
        inv = 1.0 / (t + ZERO_C_IN_K) - 1.0 / (kin.ref_temp_c + ZERO_C_IN_K)
        k = kin.k_ref_um3_per_day * np.exp(-ea_j / R_J_PER_MOL_K * inv)
    return k * np.clip((t - kin.tg_prime_c) / TG_TAPER_K, 0.0, 1.0)
