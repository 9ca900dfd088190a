"""A mix's freezing curve and Tg' from its composition: how the product families' [ice] and
tg_prime_c were derived, and how an operator derives them for their own recipe.

Freezing curve: the Goff & Hartel method (Ice Cream, 7th ed., 2013, pp. 181-186 [published,
read through a secondary source that quotes its tables]). The sugars are counted as sucrose
equivalents (SE, g per 100 g mix: each solute's mass times 342 / its molar mass); as water
freezes out, the SE concentration in the water left (g per 100 g water) gives the depression
from the measured table of sucrose solutions (Table 6.1), and milk salts add 2.37 K times the
milk solids-not-fat over the water left (p. 183). Past the table's end (180 g / 100 g water) the
book's quadratic through zero (Table 6.3) carries on, joined to the table's last value.

The model's own ice curve is the ASHRAE form x_ice = (x_wo - x_b)(1 - t_f / t)
(watcher.model.icefraction); ``fit_ice_curve`` gives its t_f (the method's initial freezing
point) and the bound water x_b that fits the method's curve best over the storage range.

Tg': a mass-weighted mean of the carbohydrates' own Tg' (Levine & Slade 1986, Carbohydr.
Polym. 6:213 [from memory, approximate]); fat, protein and stabiliser are left out. A coarse
estimate, good to a few kelvin; a DSC measurement of the product is better.

Pure: numpy and the standard library only.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from watcher.errors import ProfileError

#: Freezing-point depression (K) of sucrose solutions against g sucrose per 100 g water
#: (Goff & Hartel 2013, Table 6.1 [published, secondary]).
SUCROSE_FPD_TABLE = (
    (0, 0.00), (3, 0.18), (6, 0.35), (9, 0.53), (12, 0.72), (15, 0.90), (18, 1.10), (21, 1.29),
    (24, 1.47), (27, 1.67), (30, 1.86), (33, 2.03), (36, 2.21), (39, 2.40), (42, 2.60), (45, 2.78),
    (48, 2.99), (51, 3.20), (54, 3.42), (57, 3.63), (60, 3.85), (63, 4.10), (66, 4.33), (69, 4.54),
    (72, 4.77), (75, 5.00), (78, 5.26), (81, 5.53), (84, 5.77), (87, 5.99), (90, 6.23), (93, 6.50),
    (96, 6.80), (99, 7.04), (102, 7.32), (105, 7.56), (108, 7.80), (111, 8.04), (114, 8.33),
    (117, 8.62), (120, 8.92), (123, 9.19), (126, 9.45), (129, 9.71), (132, 9.96), (135, 10.22),
    (138, 10.47), (141, 10.72), (144, 10.97), (147, 11.19), (150, 11.41), (153, 11.63),
    (156, 11.88), (159, 12.14), (162, 12.40), (165, 12.67), (168, 12.88), (171, 13.08),
    (174, 13.28), (177, 13.48), (180, 13.68),
)  # fmt: skip
#: Table 6.3's quadratic through zero, FPD = a c^2 + b c (c in g / 100 g water) [published, secondary].
QUAD_A, QUAD_B = 0.00009, 0.0612
#: Milk salts: K per (g milk solids-not-fat / g water) (Goff & Hartel 2013, p. 183 [published, secondary]).
MILK_SALTS_K = 2.37
#: Lactose share of milk solids-not-fat (Goff & Hartel 2013, p. 181 [published, secondary]).
LACTOSE_IN_MSNF = 0.545


@dataclass(frozen=True)
class Solute:
    """A solute's freezing-point power relative to sucrose and its own Tg' (None: not counted)."""

    se_factor: float
    tg_prime_c: float | None


#: 342 / molar mass for the sugars [derived]; glucose syrups by their dextrose equivalent
#: (Goff & Hartel 2013 [from memory]); Tg' of each (Levine & Slade 1986 [from memory, approximate]).
SOLUTES = {
    "sucrose": Solute(1.0, -32.0),
    "lactose": Solute(1.0, -28.0),
    "dextrose": Solute(1.9, -43.0),
    "fructose": Solute(1.9, -42.0),
    "glucose-syrup-42de": Solute(0.8, -27.5),
    "maltodextrin-10de": Solute(0.2, -10.0),
    "lactic-acid": Solute(3.8, None),
}


@dataclass(frozen=True)
class Mix:
    """A mix in g per 100 g: water, milk solids-not-fat (its lactose counted as a solute) and
    the other solutes by name (keys of SOLUTES)."""

    water_pct: float
    msnf_pct: float = 0.0
    solutes_pct: tuple[tuple[str, float], ...] = ()

    def parts(self) -> list[tuple[str, float]]:
        """Every counted solute, the lactose of the milk solids included."""
        lactose = [("lactose", LACTOSE_IN_MSNF * self.msnf_pct)] if self.msnf_pct > 0 else []
        return list(self.solutes_pct) + lactose


def sucrose_fpd_k(conc_g_per_100g_water):
    """Depression (K) of a sucrose solution: the table, then its quadratic joined at 180."""
    c = np.asarray(conc_g_per_100g_water, dtype=float)
    xs, ys = np.array(SUCROSE_FPD_TABLE, dtype=float).T
    beyond = ys[-1] + QUAD_A * (c**2 - xs[-1] ** 2) + QUAD_B * (c - xs[-1])
    return np.where(c <= xs[-1], np.interp(c, xs, ys), beyond)


def sucrose_equivalent_pct(mix: Mix) -> float:
    """SE, g per 100 g mix."""
    return float(sum(SOLUTES[name].se_factor * pct for name, pct in mix.parts()))


def freezing_temp_c(mix: Mix, frozen_share):
    """Temperature (C) at which frozen_share (0..1) of the mix's water is ice."""
    water_left = mix.water_pct * (1.0 - np.asarray(frozen_share, dtype=float))
    se = sucrose_equivalent_pct(mix)
    return -(sucrose_fpd_k(100.0 * se / water_left) + MILK_SALTS_K * mix.msnf_pct / water_left)


def frozen_share_at(mix: Mix, temp_c):
    """Share of the mix's water frozen at temp_c (0 above the initial freezing point)."""
    shares = 1.0 - np.geomspace(1.0, 1e-4, 4000)
    temps = freezing_temp_c(mix, shares)
    return np.interp(-np.asarray(temp_c, dtype=float), -temps, shares, left=0.0)


@dataclass(frozen=True)
class FittedCurve:
    water_fraction: float
    bound_water_fraction: float
    initial_freezing_point_c: float
    #: Largest gap in ice mass fraction between the fitted form and the method over the range.
    max_error: float


def fit_ice_curve(mix: Mix, lo_c: float = -30.0, hi_c: float = -5.0) -> FittedCurve:
    """The ASHRAE-form parameters that follow the method's curve from hi_c down to lo_c: t_f
    is the method's initial freezing point; x_b is the least-squares fit (closed form)."""
    x_wo = mix.water_pct / 100.0
    t_f = float(freezing_temp_c(mix, 0.0))
    if t_f - 1.0 <= lo_c:
        raise ProfileError("mix", round(t_f, 2), f"an initial freezing point above {lo_c + 1.0:g} C (too much solute)")
    temps = np.linspace(lo_c, min(hi_c, t_f - 1.0), 101)
    ice = x_wo * frozen_share_at(mix, temps)
    g = 1.0 - t_f / temps
    freezable = float(np.sum(g * ice) / np.sum(g * g))
    err = float(np.max(np.abs(freezable * g - ice)))
    return FittedCurve(x_wo, x_wo - freezable, t_f, err)


def tg_prime_c(mix: Mix) -> float:
    """Mass-weighted mean of the counted carbohydrates' Tg' (C)."""
    pairs = [(SOLUTES[n].tg_prime_c, pct) for n, pct in mix.parts() if SOLUTES[n].tg_prime_c is not None]
    total = sum(pct for _, pct in pairs)
    if total <= 0:
        raise ProfileError(
            "mix",
            dict(mix.parts()),
            "at least one carbohydrate of known Tg' ("
            + ", ".join(n for n, sol in SOLUTES.items() if sol.tg_prime_c is not None)
            + ")",
        )
    return float(sum(tg * pct for tg, pct in pairs) / total)


def parse_mix(water_pct: float, msnf_pct: float, solutes: dict[str, float], prefix: str = "") -> Mix:
    """A validated Mix; errors name the part (after prefix, e.g. "--" for options), the value
    and what was expected."""
    if not 0.0 < water_pct <= 100.0:
        raise ProfileError(f"{prefix}water", water_pct, "g water per 100 g of mix, above 0 and at most 100")
    if not 0.0 <= msnf_pct < 100.0:
        raise ProfileError(f"{prefix}msnf", msnf_pct, "g milk solids-not-fat per 100 g of mix, 0 or more")
    for name, pct in solutes.items():
        if name not in SOLUTES:
            raise ProfileError(f"{prefix}solute {name}", pct, "a solute of " + ", ".join(SOLUTES))
        if not 0.0 <= pct < 100.0:
            raise ProfileError(f"{prefix}solute {name}", pct, "g per 100 g of mix, 0 or more")
    total = water_pct + msnf_pct + sum(solutes.values())
    if total > 100.0 + 1e-9:
        raise ProfileError(
            f"{prefix}water + {prefix}msnf + {prefix}solute",
            round(total, 3),
            "water, milk solids and solutes adding up to at most 100 g per 100 g",
        )
    return Mix(float(water_pct), float(msnf_pct), tuple((n, float(p)) for n, p in solutes.items()))
