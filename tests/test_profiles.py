"""Profile validation: every refusal names the field, the value and the allowed range."""

import tomllib

import pytest

from tests.model_checks import days_to_limit_at
from watcher.errors import ProfileError
from watcher.files.profiles import builtin_names, load_profile, profile_to_toml
from watcher.model.profiles import parse_life, profile_from_dict

BASE = {"name": "p", "kinetics": {"k_ref_um3_per_day": 1000.0, "activation_energy_kj_per_mol": 80.0}}


def with_(section, **values):
    data = {k: (dict(v) if isinstance(v, dict) else v) for k, v in BASE.items()}
    data.setdefault(section, {}).update(values)
    return data


@pytest.mark.parametrize(
    ("data", "field", "hint"),
    [
        (with_("initial", mean_diameter_um=-5.0), "profile.initial.mean_diameter_um", "(0.0, 1000.0]"),
        (
            with_("texture", limit_mean_diameter_um=30.0),
            "profile.texture.limit_mean_diameter_um",
            "above the initial mean",
        ),
        (with_("initial", shape="square"), "profile.initial.shape", "one of gamma, lsw"),
        (with_("kinetics", k_ref_um3_per_day="fast"), "profile.kinetics.k_ref_um3_per_day", "a number"),
        (with_("kinetics", ref_temp_c=-40.0), "profile.kinetics.ref_temp_c", "between tg_prime_c"),
        (with_("ice", bound_water_fraction=0.7), "profile.ice.bound_water_fraction", "less than water_fraction"),
        (with_("ice", colour="blue"), "profile.ice.colour", "no such key"),
        (
            with_("kinetics", form="wlf", tg_prime_c=-60.0, ref_temp_c=-25.0),
            "profile.kinetics.tg_prime_c",
            "validity range",
        ),
        (with_("initial", mean_diameter_um=float("nan")), "profile.initial.mean_diameter_um", "finite"),
    ],
)
def test_impossible_profiles_are_refused_with_the_field_named(data, field, hint):
    """Each impossible value raises ProfileError naming the key path and what was expected."""
    with pytest.raises(ProfileError) as info:
        profile_from_dict(data)
    assert str(info.value).startswith(field + ":")
    assert hint in str(info.value)


def test_wlf_validity_must_cover_the_frozen_range():
    """WLF is valid from Tg' to Tg'+50 K: Tg' = -55 C cannot cover a product freezing at -2.5 C."""
    ok = profile_from_dict(with_("kinetics", form="wlf", tg_prime_c=-50.0, ref_temp_c=-25.0))
    assert ok.kinetics.form == "wlf"
    with pytest.raises(ProfileError, match="Tg' >= -52.5"):
        profile_from_dict(with_("kinetics", form="wlf", tg_prime_c=-55.0, ref_temp_c=-25.0))


def test_rate_in_the_linear_cube_root_form_keeps_its_time_to_the_limit():
    """R of L = L0 + R t^(1/3) (Donhowe & Hartel 1996) reaches the limit at ((L_lim - L0)/R)^3 days
    [derived]; the profile reaches it at the same time at the reference temperature (K = R^3,
    the old reading, was 24x off with L0 35 um and a 50 um limit)."""
    data = {"name": "r", "kinetics": {"r_um_per_cuberoot_day": 2.0, "activation_energy_kj_per_mol": 60.0}}
    prof = profile_from_dict(data)
    expected_days = ((50.0 - 35.0) / 2.0) ** 3  # 421.9 days at -18 C
    assert prof.life.days == pytest.approx(expected_days) and prof.life.temp_c == -18.0
    assert days_to_limit_at(prof, -18.0) == pytest.approx(expected_days, rel=0.02)


def test_declared_life_and_rate_constant_must_agree():
    """A [life] beside a rate constant that says otherwise is refused, naming both."""
    data = {
        "name": "l",
        "life": {"days": 300.0, "temp_c": -18.0},
        "kinetics": {"k_ref_um3_per_day": 1.0, "activation_energy_kj_per_mol": 100.0},
    }
    with pytest.raises(ProfileError, match="k_ref_um3_per_day.*declared life gives"):
        profile_from_dict(data)


def test_limit_ratio_and_scale():
    """A limit may be relative to the initial size; a conflicting absolute limit is refused."""
    ok = profile_from_dict(with_("texture", limit_ratio=1.5, scale="sem"))
    assert ok.limit_mean_diameter_um == pytest.approx(52.5) and ok.scale == "sem"
    with pytest.raises(ProfileError, match="limit_ratio"):
        profile_from_dict(with_("texture", limit_ratio=1.5, limit_mean_diameter_um=50.0))


@pytest.mark.parametrize(
    ("text", "days", "temp_c"),
    [
        ("18 months at -18 C", 547.875, -18.0),
        ("182 days at -18", 182.0, -18.0),
        ("2 years at \u221225 \u00b0C", 730.5, -25.0),
    ],
)
def test_declared_life_one_line_form(text, days, temp_c):
    """The one-line declared life reads days, weeks, months or years at a temperature."""
    life = parse_life(text)
    assert life.days == pytest.approx(days) and life.temp_c == temp_c


def test_declared_life_one_line_form_refuses_nonsense():
    """A life without a unit or temperature is refused with the expected form."""
    with pytest.raises(ProfileError, match="18 months at -18 C"):
        parse_life("forever")


def test_shipped_profiles_round_trip_through_toml():
    """Every shipped profile loads, and writing it as TOML reads back to an equal profile."""
    assert "dairy-ice-cream" in builtin_names()
    for name in builtin_names():
        prof = load_profile(name)
        assert profile_from_dict(tomllib.loads(profile_to_toml(prof, ["header"]))) == prof


def test_missing_profile_file_is_a_clear_error(tmp_path):
    """An unknown profile name or path names the value and lists the shipped profiles."""
    with pytest.raises(ProfileError, match="dairy-ice-cream"):
        load_profile(str(tmp_path / "nope.toml"))
    bad = tmp_path / "bad.toml"
    bad.write_text("name = [")
    with pytest.raises(ProfileError, match="valid TOML"):
        load_profile(str(bad))
