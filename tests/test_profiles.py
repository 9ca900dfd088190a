"""Profile validation: every refusal names the field, the value and the allowed range."""

import tomllib

import pytest

from watcher.errors import ProfileError
from watcher.files.profiles import builtin_names, load_profile, profile_to_toml
from watcher.model.profiles import profile_from_dict

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


def test_rate_can_be_given_in_the_linear_cube_root_form():
    """R of L = L0 + R t^(1/3) (Donhowe & Hartel 1996) is read as K = R^3 [derived, valid for L >> L0]."""
    data = {"name": "r", "kinetics": {"r_um_per_cuberoot_day": 12.0, "activation_energy_kj_per_mol": 60.0}}
    assert profile_from_dict(data).kinetics.k_ref_um3_per_day == pytest.approx(1728.0)


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
