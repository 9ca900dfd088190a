"""Product profiles: named, validated parameter sets for one product.

A profile is plain data (frozen dataclasses) built from a TOML-shaped dict. Every check names
the field, the value and the allowed range, and raises ProfileError. Reading and writing files
happens at the edge (watcher.profile_files); this module only validates and converts.
"""

from __future__ import annotations

import math
import re
from dataclasses import asdict, dataclass, replace

from watcher.errors import ProfileError
from watcher.model.kinetics import LSW_A_OVER_K, WLF_VALID_SPAN_K, Kinetics, rate_um3_per_day
from watcher.model.population import master_curve, reduced_time_to

SHAPES = ("gamma", "lsw")
FORMS = ("arrhenius", "wlf")


#: Default spread of a fresh product's crystal diameters: a gamma distribution of mean 35 um
#: with CV 0.5 puts its 1-in-10,000 largest crystal near 140 um, matching the published range
#: of fresh hardened ice cream, about 1 to over 150 um around a 35 um mean (Cook & Hartel 2010)
#: [derived, approximate].
DEFAULT_SPREAD_CV = 0.5
DEFAULT_SCALE = "light-microscopy"
#: 90 % range of the rate constant when a profile states none: K / 2.2 .. K x 2.2, about the
#: x5 spread between products [derived from the product-to-product spread in the outside review].
DEFAULT_RATE_FACTOR_90 = 2.2


@dataclass(frozen=True)
class Initial:
    mean_diameter_um: float = 35.0
    shape: str = "gamma"
    spread_cv: float = DEFAULT_SPREAD_CV


@dataclass(frozen=True)
class Life:
    """A declared storage life: the product reaches its texture limit after `days` at a
    constant `temp_c`. The rate constant follows from it through the model's own isothermal
    curve, so simulating constant `temp_c` gives back `days`."""

    days: float
    temp_c: float


@dataclass(frozen=True)
class IceCurve:
    water_fraction: float = 0.617
    bound_water_fraction: float = 0.0
    initial_freezing_point_c: float = -2.5


@dataclass(frozen=True)
class Profile:
    name: str
    description: str
    initial: Initial
    limit_mean_diameter_um: float
    kinetics: Kinetics
    ice: IceCurve
    source: str = ""
    scale: str = DEFAULT_SCALE
    limit_ratio: float | None = None
    life: Life | None = None

    def as_dict(self) -> dict:
        """The resolved parameters, in the same shape the TOML file uses (a declared life is
        written beside the rate constant it resolves to; reading both back checks they agree)."""
        texture = {"scale": self.scale, "limit_mean_diameter_um": self.limit_mean_diameter_um}
        if self.limit_ratio is not None:
            texture["limit_ratio"] = self.limit_ratio
        out = {
            "name": self.name,
            "description": self.description,
            "source": self.source,
            "initial": asdict(self.initial),
            "texture": texture,
            "kinetics": {
                "form": self.kinetics.form,
                "k_ref_um3_per_day": self.kinetics.k_ref_um3_per_day,
                "ref_temp_c": self.kinetics.ref_temp_c,
                "tg_prime_c": self.kinetics.tg_prime_c,
                "activation_energy_kj_per_mol": self.kinetics.activation_energy_kj_per_mol,
                "wlf_c1": self.kinetics.wlf_c1,
                "wlf_c2_k": self.kinetics.wlf_c2_k,
                "rate_factor_90": self.kinetics.rate_factor_90,
            },
            "ice": asdict(self.ice),
        }
        if self.life is not None:
            out["life"] = asdict(self.life)
        return out


def _section(data: dict, key: str, where: str) -> dict:
    value = data.get(key, {})
    if not isinstance(value, dict):
        raise ProfileError(f"{where}.{key}", value, "a table")
    return value


def _number(table: dict, key: str, where: str, default, lo=-math.inf, hi=math.inf, lo_open=False) -> float:
    value = table.get(key, default)
    if value is None:
        raise ProfileError(f"{where}.{key}", value, "a number (the key is required)")
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ProfileError(f"{where}.{key}", value, "a number")
    value = float(value)
    low_bad = value <= lo if lo_open else value < lo
    if not math.isfinite(value) or low_bad or value > hi:
        bracket = "(" if lo_open else "["
        raise ProfileError(f"{where}.{key}", value, f"a finite number in {bracket}{lo}, {hi}]")
    return value


def _choice(table: dict, key: str, where: str, default: str, allowed: tuple[str, ...]) -> str:
    value = table.get(key, default)
    if value not in allowed:
        raise ProfileError(f"{where}.{key}", value, "one of " + ", ".join(allowed))
    return value


def _reject_unknown(table: dict, allowed: set[str], where: str) -> None:
    for key in table:
        if key not in allowed:
            raise ProfileError(
                f"{where}.{key}", table[key], "no such key (allowed: " + ", ".join(sorted(allowed)) + ")"
            )


def profile_from_dict(data: dict, where: str = "profile") -> Profile:
    """Validate a TOML-shaped dict and build a Profile; raise ProfileError naming the field."""
    _reject_unknown(data, {"name", "description", "source", "initial", "texture", "kinetics", "ice", "life"}, where)
    name = data.get("name")
    if not isinstance(name, str) or not name.strip():
        raise ProfileError(f"{where}.name", name, "a non-empty string")
    ini = _section(data, "initial", where)
    _reject_unknown(ini, {"mean_diameter_um", "shape", "spread_cv"}, f"{where}.initial")
    initial = Initial(
        mean_diameter_um=_number(ini, "mean_diameter_um", f"{where}.initial", 35.0, 0.0, 1000.0, lo_open=True),
        shape=_choice(ini, "shape", f"{where}.initial", "gamma", SHAPES),
        spread_cv=_number(ini, "spread_cv", f"{where}.initial", DEFAULT_SPREAD_CV, 0.05, 1.0),
    )
    limit, ratio, scale = _texture(_section(data, "texture", where), f"{where}.texture", initial.mean_diameter_um)
    ice_t = _section(data, "ice", where)
    _reject_unknown(ice_t, {"water_fraction", "bound_water_fraction", "initial_freezing_point_c"}, f"{where}.ice")
    ice = IceCurve(
        water_fraction=_number(ice_t, "water_fraction", f"{where}.ice", 0.617, 0.0, 1.0, lo_open=True),
        bound_water_fraction=_number(ice_t, "bound_water_fraction", f"{where}.ice", 0.0, 0.0, 1.0),
        initial_freezing_point_c=_number(
            ice_t, "initial_freezing_point_c", f"{where}.ice", -2.5, -30.0, 0.0, lo_open=False
        ),
    )
    if ice.bound_water_fraction >= ice.water_fraction:
        raise ProfileError(
            f"{where}.ice.bound_water_fraction",
            ice.bound_water_fraction,
            f"less than water_fraction ({ice.water_fraction})",
        )
    kin_t = _section(data, "kinetics", where)
    anchored = "life" in data or "r_um_per_cuberoot_day" in kin_t
    kinetics = _kinetics(kin_t, f"{where}.kinetics", ice.initial_freezing_point_c, anchored)
    life = _life(data, kin_t, where, kinetics, initial, limit)
    if life is not None:
        k_ref = k_ref_for_life(kinetics, initial, limit, life, ice.initial_freezing_point_c, f"{where}.life")
        _must_agree(
            kin_t,
            "k_ref_um3_per_day",
            k_ref,
            f"{where}.kinetics",
            f"no rate constant beside [life] (the declared life gives {k_ref:.6g} um^3/day), or exactly that value",
        )
        kinetics = replace(kinetics, k_ref_um3_per_day=k_ref)
    return Profile(
        name=name.strip(),
        description=str(data.get("description", "")),
        source=str(data.get("source", "")),
        initial=initial,
        limit_mean_diameter_um=limit,
        kinetics=kinetics,
        ice=ice,
        scale=scale,
        limit_ratio=ratio,
        life=life,
    )


def _must_agree(table: dict, key: str, derived: float, where: str, expected: str) -> None:
    """A value given beside the one it is derived from (written back by as_dict) must agree."""
    given = table.get(key)
    if given is None:
        return
    if isinstance(given, bool) or not isinstance(given, (int, float)) or not math.isclose(given, derived, rel_tol=1e-6):
        raise ProfileError(f"{where}.{key}", given, expected)


def _texture(tex: dict, where: str, initial_um: float) -> tuple[float, float | None, str]:
    """The limit on the profile's one measurement scale: absolute, or relative to the initial
    mean diameter (which then carries over to a trial's own day-0 size)."""
    _reject_unknown(tex, {"limit_mean_diameter_um", "limit_ratio", "scale"}, where)
    scale = tex.get("scale", DEFAULT_SCALE)
    if not isinstance(scale, str) or not scale.strip():
        raise ProfileError(
            f"{where}.scale", scale, "a non-empty name of the measurement method (e.g. light-microscopy)"
        )
    ratio = None
    if "limit_ratio" in tex:
        ratio = _number(tex, "limit_ratio", where, None, 1.0, 100.0, lo_open=True)
        limit = ratio * initial_um
        _must_agree(
            tex,
            "limit_mean_diameter_um",
            limit,
            where,
            f"only one of limit_mean_diameter_um and limit_ratio, or values that agree ({limit:.6g} um)",
        )
    else:
        limit = _number(tex, "limit_mean_diameter_um", where, 50.0, 0.0, 1000.0, lo_open=True)
    if limit <= initial_um:
        raise ProfileError(
            f"{where}.limit_mean_diameter_um", limit, f"a limit above the initial mean diameter ({initial_um} um)"
        )
    return limit, ratio, scale.strip()


def _life(data: dict, kin: dict, where: str, kinetics: Kinetics, initial: Initial, limit: float) -> Life | None:
    """The declared life ([life] days at temp_c), or the one a Donhowe & Hartel rate R implies."""
    life_t = data.get("life")
    if "r_um_per_cuberoot_day" in kin:
        if life_t is not None:
            raise ProfileError(
                f"{where}.kinetics.r_um_per_cuberoot_day", kin["r_um_per_cuberoot_day"], "no R beside [life]"
            )
        # L = L0 + R t^(1/3) reaches the limit at t = ((L_lim - L0) / R)^3 [derived]. That time,
        # not K = R^3 (right only when L >> L0), is what the profile is anchored to.
        r = _number(kin, "r_um_per_cuberoot_day", f"{where}.kinetics", None, 0.0, 1000.0, lo_open=True)
        return Life(days=((limit - initial.mean_diameter_um) / r) ** 3, temp_c=kinetics.ref_temp_c)
    if life_t is None:
        return None
    if not isinstance(life_t, dict):
        raise ProfileError(f"{where}.life", life_t, "a table with days and temp_c")
    _reject_unknown(life_t, {"days", "temp_c"}, f"{where}.life")
    return Life(
        days=_number(life_t, "days", f"{where}.life", None, 0.0, 1e6, lo_open=True),
        temp_c=_number(life_t, "temp_c", f"{where}.life", None, -80.0, 0.0),
    )


_UNIT_DAYS = {
    "d": 1.0,
    "day": 1.0,
    "days": 1.0,
    "w": 7.0,
    "week": 7.0,
    "weeks": 7.0,
    "month": 30.4375,
    "months": 30.4375,
    "mo": 30.4375,
    "y": 365.25,
    "year": 365.25,
    "years": 365.25,
}
_LIFE_RE = re.compile(
    r"^\s*([0-9]+(?:\.[0-9]*)?)\s*([a-z]+)\s+at\s+([-+\u2212]?[0-9]+(?:\.[0-9]*)?)\s*(?:\u00b0?\s*c)?\s*$"
)


def parse_life(text: str, where: str = "--life") -> Life:
    """'18 months at -18 C', '182 days at -18', '2 years at -25 °C' -> Life (days, temp_c)."""
    m = _LIFE_RE.match(str(text).lower())
    if not m or m.group(2) not in _UNIT_DAYS:
        raise ProfileError(where, text, "a declared life like '18 months at -18 C' (days, weeks, months or years)")
    days = float(m.group(1)) * _UNIT_DAYS[m.group(2)]
    temp = float(m.group(3).replace("\u2212", "-"))
    if days <= 0:
        raise ProfileError(where, text, "a storage life longer than 0 days")
    return Life(days=days, temp_c=temp)


def k_ref_for_life(
    kin: Kinetics, initial: Initial, limit_um: float, life: Life, freezing_point_c: float, where: str = "life"
) -> float:
    """K_ref such that the model, held at life.temp_c, reaches the limit after life.days.

    The isothermal run depends on time only through theta = (9/4) K(T) t, so the reduced time
    from the initial size to the limit (the master curve) fixes K(T_life); the temperature
    dependence then carries it to the reference temperature."""
    if life.temp_c >= freezing_point_c:
        raise ProfileError(
            f"{where}.temp_c",
            life.temp_c,
            f"a frozen temperature below the initial freezing point {freezing_point_c} C",
        )
    unit = rate_um3_per_day(replace(kin, k_ref_um3_per_day=1.0), life.temp_c, freezing_point_c)
    if not unit > 0:
        raise ProfileError(
            f"{where}.temp_c",
            life.temp_c,
            f"a temperature above Tg' ({kin.tg_prime_c} C), where the product coarsens at all",
        )
    master = master_curve(initial.shape, initial.spread_cv)
    theta = float(reduced_time_to(master, limit_um / initial.mean_diameter_um)) * initial.mean_diameter_um**3
    return theta / (LSW_A_OVER_K * life.days * float(unit))


def _kinetics(kin: dict, where: str, freezing_point_c: float, anchored: bool) -> Kinetics:
    _reject_unknown(
        kin,
        {
            "form",
            "k_ref_um3_per_day",
            "r_um_per_cuberoot_day",
            "ref_temp_c",
            "tg_prime_c",
            "activation_energy_kj_per_mol",
            "wlf_c1",
            "wlf_c2_k",
            "rate_factor_90",
        },
        where,
    )
    form = _choice(kin, "form", where, "arrhenius", FORMS)
    if "k_ref_um3_per_day" in kin and "r_um_per_cuberoot_day" in kin:
        raise ProfileError(
            f"{where}.r_um_per_cuberoot_day",
            kin["r_um_per_cuberoot_day"],
            "only one of k_ref_um3_per_day and r_um_per_cuberoot_day",
        )
    # With [life] or R the rate constant is resolved later; 1.0 is a placeholder until then.
    if not anchored and "k_ref_um3_per_day" not in kin:
        raise ProfileError(
            f"{where}.k_ref_um3_per_day",
            None,
            "a rate constant, or a declared life instead ([life] days and temp_c), or r_um_per_cuberoot_day",
        )
    k_ref = 1.0 if anchored else _number(kin, "k_ref_um3_per_day", where, None, 0.0, 1e9, lo_open=True)
    tg = _number(kin, "tg_prime_c", where, -32.0, -80.0, 0.0)
    ref = _number(kin, "ref_temp_c", where, -18.0, -80.0, 0.0)
    if not tg < ref < freezing_point_c:
        raise ProfileError(
            f"{where}.ref_temp_c",
            ref,
            f"a temperature between tg_prime_c ({tg}) and the initial freezing point ({freezing_point_c})",
        )
    ea = _number(
        kin,
        "activation_energy_kj_per_mol",
        where,
        0.0 if form == "wlf" else None,
        0.0,
        1000.0,
        lo_open=form == "arrhenius",
    )
    c1 = _number(kin, "wlf_c1", where, 17.44, 0.0, 100.0, lo_open=True)
    c2 = _number(kin, "wlf_c2_k", where, 51.6, 0.0, 500.0, lo_open=True)
    factor = _number(kin, "rate_factor_90", where, DEFAULT_RATE_FACTOR_90, 1.0, 100.0)
    if form == "wlf" and freezing_point_c > tg + WLF_VALID_SPAN_K:
        raise ProfileError(
            f"{where}.tg_prime_c",
            tg,
            f"a Tg' whose WLF validity range (Tg' .. Tg'+{WLF_VALID_SPAN_K:g} K) covers the frozen range up to "
            f"the initial freezing point {freezing_point_c} C, i.e. Tg' >= {freezing_point_c - WLF_VALID_SPAN_K:g} C",
        )
    return Kinetics(
        form=form,
        k_ref_um3_per_day=k_ref,
        ref_temp_c=ref,
        tg_prime_c=tg,
        activation_energy_kj_per_mol=ea,
        wlf_c1=c1,
        wlf_c2_k=c2,
        rate_factor_90=factor,
    )
