"""Product profiles: named, validated parameter sets for one product.

A profile is plain data (frozen dataclasses) built from a TOML-shaped dict. Every check names
the field, the value and the allowed range, and raises ProfileError. Reading and writing files
happens at the edge (watcher.profile_files); this module only validates and converts.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

from watcher.errors import ProfileError
from watcher.model.kinetics import WLF_VALID_SPAN_K, Kinetics

SHAPES = ("gamma", "lsw")
FORMS = ("arrhenius", "wlf")


@dataclass(frozen=True)
class Initial:
    mean_diameter_um: float = 35.0
    shape: str = "gamma"
    spread_cv: float = 0.35


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

    def as_dict(self) -> dict:
        """The resolved parameters, in the same shape the TOML file uses."""
        return {
            "name": self.name,
            "description": self.description,
            "source": self.source,
            "initial": asdict(self.initial),
            "texture": {"limit_mean_diameter_um": self.limit_mean_diameter_um},
            "kinetics": {
                "form": self.kinetics.form,
                "k_ref_um3_per_day": self.kinetics.k_ref_um3_per_day,
                "ref_temp_c": self.kinetics.ref_temp_c,
                "tg_prime_c": self.kinetics.tg_prime_c,
                "activation_energy_kj_per_mol": self.kinetics.activation_energy_kj_per_mol,
                "wlf_c1": self.kinetics.wlf_c1,
                "wlf_c2_k": self.kinetics.wlf_c2_k,
            },
            "ice": asdict(self.ice),
        }


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
    _reject_unknown(data, {"name", "description", "source", "initial", "texture", "kinetics", "ice"}, where)
    name = data.get("name")
    if not isinstance(name, str) or not name.strip():
        raise ProfileError(f"{where}.name", name, "a non-empty string")
    ini = _section(data, "initial", where)
    _reject_unknown(ini, {"mean_diameter_um", "shape", "spread_cv"}, f"{where}.initial")
    initial = Initial(
        mean_diameter_um=_number(ini, "mean_diameter_um", f"{where}.initial", 35.0, 0.0, 1000.0, lo_open=True),
        shape=_choice(ini, "shape", f"{where}.initial", "gamma", SHAPES),
        spread_cv=_number(ini, "spread_cv", f"{where}.initial", 0.35, 0.05, 1.0),
    )
    tex = _section(data, "texture", where)
    _reject_unknown(tex, {"limit_mean_diameter_um"}, f"{where}.texture")
    limit = _number(tex, "limit_mean_diameter_um", f"{where}.texture", 50.0, 0.0, 1000.0, lo_open=True)
    if limit <= initial.mean_diameter_um:
        raise ProfileError(
            f"{where}.texture.limit_mean_diameter_um",
            limit,
            f"a limit above the initial mean diameter ({initial.mean_diameter_um} um)",
        )
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
    kinetics = _kinetics(_section(data, "kinetics", where), f"{where}.kinetics", ice.initial_freezing_point_c)
    return Profile(
        name=name.strip(),
        description=str(data.get("description", "")),
        source=str(data.get("source", "")),
        initial=initial,
        limit_mean_diameter_um=limit,
        kinetics=kinetics,
        ice=ice,
    )


def _kinetics(kin: dict, where: str, freezing_point_c: float) -> Kinetics:
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
    if "r_um_per_cuberoot_day" in kin:
        # L = L0 + R t^(1/3) (Donhowe & Hartel 1996) agrees with L^3 = L0^3 + K t only when
        # L >> L0, where K = R^3 [derived]; the profile documentation says so.
        r = _number(kin, "r_um_per_cuberoot_day", where, None, 0.0, 1000.0, lo_open=True)
        k_ref = r**3
    else:
        k_ref = _number(kin, "k_ref_um3_per_day", where, None, 0.0, 1e9, lo_open=True)
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
    )
