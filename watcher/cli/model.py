"""`watcher simulate`, `watcher profile list/show` and `watcher calibrate`: the model on files."""

from __future__ import annotations

import json
from pathlib import Path

import click

from watcher import __version__
from watcher.cli.app import main
from watcher.cli.common import fmt, stamp, table
from watcher.errors import ProfileError, WatcherError
from watcher.ranges import figure_text


def figure_table(rows: dict[str, dict]) -> str:
    """One line per exposure position: state, temperatures, sizes, budget, rate, days left."""
    head = [
        "position",
        "state",
        "product C",
        "mean um",
        "d90 um",
        ">limit vol%",
        "budget %",
        "um/day",
        "days left",
        "vs setpoint um",
    ]
    lines = []
    for name, r in rows.items():
        share = None if r["share_above_limit"] is None else 100 * r["share_above_limit"]
        lines.append(
            [
                name,
                r["state"],
                fmt(r["product_c"], ".1f"),
                fmt(r["mean_diameter_um"], ".1f"),
                fmt(r["d90_um"], ".1f"),
                fmt(share, ".1f"),
                fmt(r["budget_used_pct"], ".1f"),
                fmt(r["growth_rate_um_per_day"], ".3f"),
                fmt(r["days_to_limit"], ".1f", "never"),
                fmt(r["excess_growth_um"], "+.2f"),
            ]
        )
    return table(lines, head, ["left", "left"] + ["right"] * 8)


@main.command()
@click.option(
    "--profile",
    "profile_name",
    default=None,
    help="Shipped profile name or profile TOML file (default: dairy-ice-cream).",
)
@click.option(
    "--series",
    "series_path",
    required=True,
    type=click.Path(dir_okay=False),
    help="CSV with columns time, air_c and optionally product_c.",
)
@click.option(
    "--setpoint-c",
    type=float,
    default=None,
    help="Setpoint for the excess-growth comparison (default: the series' median air temperature).",
)
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object instead of a table.")
def simulate(profile_name, series_path, setpoint_c, as_json) -> None:
    """Predict crystal coarsening for one zone's recorded temperature series."""
    from watcher.files.profiles import load_profile
    from watcher.files.series import read_series
    from watcher.simulation import simulate as run

    profile = load_profile(profile_name)
    series = read_series(series_path)
    result = run(profile, series, setpoint_c)
    if as_json:
        click.echo(json.dumps(result, indent=2))
        return
    days = (result["end_ts"] - result["start_ts"]) / 86400.0
    click.echo(
        f"Series   {series_path}: {result['samples']} samples, {stamp(result['start_ts'])} to {stamp(result['end_ts'])} ({days:.1f} days)"
    )
    click.echo(
        f"Profile  {result['profile']}; setpoint {result['setpoint_c']:.1f} C; texture limit {result['limit_mean_diameter_um']:.0f} um mean diameter"
    )
    click.echo("")
    for line in figure_table(result["positions"]).splitlines():
        click.echo(line)
    w = result["positions"][result["worst_position"]]
    click.echo("")
    click.echo(
        f"Most budget used: {result['worst_position']} "
        f"({figure_text(w, 'budget_used_pct', '.1f')} %; 90 % range in brackets), "
        f"{figure_text(w, 'days_to_limit', '.0f', 'never')} days to the limit if its product stayed "
        "at its last temperature."
    )
    click.echo(
        f"The additive rule (sum of time / life at each temperature) would say {fmt(w['additive_rule_budget_pct'], '.1f')} %:"
        " the difference is what temperature cycling costs beyond the time spent at each temperature."
    )
    click.echo(result["caution"])


@main.group()
def profile() -> None:
    """Product profiles: list the shipped ones, show resolved parameters."""


@profile.command("list")
def profile_list() -> None:
    """List the shipped profiles."""
    from watcher.files.profiles import builtin_names, load_profile

    for name in builtin_names():
        click.echo(f"{name}: {load_profile(name).description}")


@profile.command("show")
@click.argument("name")
@click.option("--json", "as_json", is_flag=True, help="Print the resolved parameters as JSON.")
def profile_show(name, as_json) -> None:
    """Show a profile's resolved parameters (NAME is a shipped name or a TOML file)."""
    from watcher.files.profiles import load_profile, profile_to_toml

    prof = load_profile(name)
    click.echo(json.dumps(prof.as_dict(), indent=2) if as_json else profile_to_toml(prof), nl=as_json)


@profile.command("mix")
@click.option("--water", "water_pct", type=float, required=True, help="Water, g per 100 g of mix.")
@click.option(
    "--msnf", "msnf_pct", type=float, default=0.0, help="Milk solids-not-fat, g per 100 g (lactose and salts counted)."
)
@click.option(
    "--solute",
    "solutes",
    multiple=True,
    metavar="NAME=G",
    help="A sugar or acid, g per 100 g (repeat): sucrose, dextrose, fructose, lactose, glucose-syrup-42de, "
    "maltodextrin-10de, lactic-acid.",
)
@click.option(
    "--tg-prime", "tg_measured_c", type=float, default=None, help="A measured Tg' (C) instead of the estimate."
)
@click.option("--base", default=None, help="With --out: the profile everything else is taken from (default: dairy).")
@click.option(
    "--out", "out_path", type=click.Path(dir_okay=False), default=None, help="Write BASE with this ice curve."
)
@click.option("--json", "as_json", is_flag=True, help="Print the curve as JSON.")
def profile_mix(water_pct, msnf_pct, solutes, tg_measured_c, base, out_path, as_json) -> None:
    """A mix's freezing curve and Tg' from its composition (Goff & Hartel method), and with
    --out a profile carrying them (the declared life, if the base has one, is kept)."""
    from watcher.model.mix import fit_ice_curve, frozen_share_at, parse_mix, sucrose_equivalent_pct, tg_prime_c

    parts = {}
    for item in solutes:
        name, sep, grams = item.partition("=")
        try:
            parts[name.strip()] = float(grams)
        except ValueError:
            raise ProfileError("--solute", item, "NAME=G, e.g. sucrose=14") from None
        if not sep:
            raise ProfileError("--solute", item, "NAME=G, e.g. sucrose=14")
    mix = parse_mix(water_pct, msnf_pct, parts, "--")
    curve = fit_ice_curve(mix)
    tg = tg_measured_c if tg_measured_c is not None else tg_prime_c(mix)
    temps = (-5.0, -10.0, -18.0, -25.0)
    frozen = {t: float(frozen_share_at(mix, t)) for t in temps}
    result = {
        "sucrose_equivalent_pct": sucrose_equivalent_pct(mix),
        "ice": {
            "water_fraction": round(curve.water_fraction, 4),
            "bound_water_fraction": round(curve.bound_water_fraction, 4),
            "initial_freezing_point_c": round(curve.initial_freezing_point_c, 2),
        },
        "fit_max_error": curve.max_error,
        "frozen_share": {f"{t:g}": v for t, v in frozen.items()},
        "tg_prime_c": round(tg, 1),
        "tg_prime_source": "measured" if tg_measured_c is not None else "estimate",
    }
    if out_path:
        _write_mix_profile(base, out_path, result)
    if as_json:
        click.echo(json.dumps(result, indent=2))
        return
    ice = result["ice"]
    click.echo(
        f"Sucrose equivalents {result['sucrose_equivalent_pct']:.1f} g per 100 g; initial freezing point "
        f"{ice['initial_freezing_point_c']:.2f} C (Goff & Hartel method)."
    )
    click.echo("Water frozen:  " + "   ".join(f"{t:g} C {100 * v:.0f} %" for t, v in frozen.items()))
    click.echo(
        f"Model ice curve: water_fraction {ice['water_fraction']}, bound_water_fraction {ice['bound_water_fraction']}, "
        f"initial_freezing_point_c {ice['initial_freezing_point_c']} (within {curve.max_error:.3f} of the method, -5 to -30 C)."
    )
    how = (
        "measured"
        if tg_measured_c is not None
        else "estimated from the sugars, good to a few K; a DSC measurement is better"
    )
    click.echo(f"Tg' {tg:.1f} C ({how}).")
    if out_path:
        click.echo(f"Wrote {out_path} (use it with --profile {out_path}).")


def _write_mix_profile(base_name, out_path, result) -> None:
    """BASE with the mix's [ice] and Tg'; a declared life is re-anchored, a fitted K_ref kept."""
    from watcher.files.profiles import load_profile
    from watcher.model.profiles import profile_from_dict

    base_prof = load_profile(base_name)
    data = base_prof.as_dict()
    data["name"] = Path(out_path).stem
    data["ice"] = dict(result["ice"])
    data["kinetics"]["tg_prime_c"] = result["tg_prime_c"]
    if "life" in data:
        data["kinetics"].pop("k_ref_um3_per_day")
    data["description"] = f"{base_prof.name} with the ice curve and Tg' of a given mix."
    data["source"] = (
        f"ice curve and Tg' ({result['tg_prime_source']}) from a mix by watcher profile mix; rest from {base_prof.name}"
    )
    prof = profile_from_dict(data, "--out")
    header = [
        f"Written by watcher {__version__} profile mix on base profile {base_prof.name}.",
        "The ice curve follows the Goff & Hartel freezing-point method on the mix given.",
        "Texture-quality parameters only; not a food-safety profile.",
    ]
    _write_profile(out_path, prof, header)


@main.command()
@click.argument("trial_path", metavar="[TRIAL.csv]", required=False, type=click.Path(dir_okay=False))
@click.option(
    "--out",
    "out_path",
    required=True,
    type=click.Path(dir_okay=False),
    help="Where to write the calibrated profile TOML.",
)
@click.option(
    "--base", default=None, help="Profile whose shape, ice curve, limit and Tg' are kept (default: dairy-ice-cream)."
)
@click.option(
    "--form",
    type=click.Choice(["arrhenius", "wlf"]),
    default=None,
    help="Temperature dependence to fit (default: the base profile's).",
)
@click.option("--name", default=None, help="Name of the new profile (default: the output file's stem).")
@click.option(
    "--life",
    "life_text",
    default=None,
    help="Instead of a trial: the declared storage life, e.g. '18 months at -18 C'.",
)
@click.option(
    "--life-spread",
    type=float,
    default=None,
    help="With --life: the 90 % range factor of the rate (default: the base profile's).",
)
@click.option("--limit-um", type=float, default=None, help="Texture limit on the trial's own measurement scale.")
@click.option("--limit-ratio", type=float, default=None, help="Texture limit as a multiple of the trial's day-0 size.")
@click.option("--json", "as_json", is_flag=True, help="Print the fit as JSON.")
def calibrate(trial_path, out_path, base, form, name, life_text, life_spread, limit_um, limit_ratio, as_json) -> None:
    """Fit a profile's kinetics to a storage trial (columns days, temp_c, mean_diameter_um), or
    anchor it to a declared storage life (--life '18 months at -18 C')."""
    from watcher.files.profiles import load_profile
    from watcher.files.trial import read_trial
    from watcher.model.calibrate import fit_trial

    base_profile = load_profile(base)
    name = name or Path(out_path).stem
    if (trial_path is None) == (life_text is None):
        raise click.UsageError("give either a trial CSV or --life 'N months at T C', not both or neither")
    if life_text is not None:
        _calibrate_from_life(base_profile, name, life_text, life_spread, out_path, as_json)
        return
    trial = read_trial(trial_path)
    fit = fit_trial(trial, base_profile, name, form, limit_um, limit_ratio)
    kin = fit.profile.kinetics
    header = [
        f"Calibrated by watcher {__version__} from {Path(trial_path).name} on base profile {base_profile.name}.",
        f"K_ref = {kin.k_ref_um3_per_day:.4g} +- {fit.sd['k_ref_um3_per_day']:.2g} um^3/day at {kin.ref_temp_c} C"
        + (
            f"; Ea = {kin.activation_energy_kj_per_mol:.4g} +- {fit.sd['activation_energy_kj_per_mol']:.2g} kJ/mol"
            if kin.form == "arrhenius"
            else f"; WLF with Tg' {kin.tg_prime_c} C"
        ),
        f"RMSE {fit.rmse_um:.2f} um over {trial.days.size} measurements; 90 % range of the rate "
        f"K / {kin.rate_factor_90:.2f} .. K x {kin.rate_factor_90:.2f}.",
        f"Scale {fit.profile.scale}: initial {fit.profile.initial.mean_diameter_um:g} um, "
        f"limit {fit.profile.limit_mean_diameter_um:.4g} um"
        + f": {fit.limit_basis}"
        + ("" if trial.scale else " (the trial declares no scale: taken as the base profile's)")
        + ".",
        "Texture-quality parameters only; not a food-safety profile.",
    ]
    _write_profile(out_path, fit.profile, header)
    groups = [
        {"temp_c": g.temp_c, "k_um3_per_day": g.k_um3_per_day, "k_rel_sd": g.k_rel_sd, "n": g.n} for g in fit.groups
    ]
    residuals = [
        {
            "days": float(d),
            "temp_c": float(t),
            "observed_um": float(o),
            "predicted_um": float(p),
            "residual_um": float(r),
        }
        for d, t, o, p, r in zip(trial.days, trial.temp_c, trial.mean_diameter_um, fit.predicted_um, fit.residual_um)
    ]
    if as_json:
        click.echo(
            json.dumps(
                {
                    "profile": fit.profile.as_dict(),
                    "params": fit.params,
                    "sd": fit.sd,
                    "rmse_um": fit.rmse_um,
                    "limit_basis": fit.limit_basis,
                    "groups": groups,
                    "residuals": residuals,
                    "out": str(out_path),
                },
                indent=2,
            )
        )
        return
    for line in header[:4]:
        click.echo(line)
    click.echo("")
    click.echo("Each temperature on its own (rate K only):")
    click.echo(f"  {'temp C':>7} {'K um^3/day':>11} {'+- %':>6} {'n':>3}")
    for g in groups:
        click.echo(f"  {g['temp_c']:7.1f} {g['k_um3_per_day']:11.4g} {100 * g['k_rel_sd']:6.0f} {g['n']:3d}")
    click.echo("")
    click.echo(f"  {'days':>6} {'temp C':>7} {'observed':>9} {'predicted':>9} {'residual':>9}")
    for r in residuals:
        click.echo(
            f"  {r['days']:6.0f} {r['temp_c']:7.1f} {r['observed_um']:9.1f} {r['predicted_um']:9.1f} {r['residual_um']:+9.1f}"
        )
    click.echo("")
    click.echo(f"Wrote {out_path} (use it with --profile {out_path}).")


def _write_profile(out_path, prof, header: list[str]) -> None:
    from watcher.files.profiles import profile_to_toml

    try:
        Path(out_path).write_text(profile_to_toml(prof, header), encoding="utf-8")
    except OSError as exc:
        raise WatcherError(f"{out_path}: cannot write the profile ({exc})") from exc


def _calibrate_from_life(base_profile, name, life_text, life_spread, out_path, as_json) -> None:
    """`watcher calibrate --life`: a profile anchored to a declared storage life."""
    from watcher.model.calibrate import from_declared_life
    from watcher.model.profiles import parse_life

    life = parse_life(life_text)
    if life_spread is not None and not 1.0 <= life_spread <= 100.0:
        raise ProfileError("--life-spread", life_spread, "a 90 % range factor from 1 to 100")
    prof = from_declared_life(base_profile, name, life, life_spread)
    kin = prof.kinetics
    header = [
        f"Anchored by watcher {__version__} to a declared life of {life.days:g} days at {life.temp_c:g} C "
        f"on base profile {base_profile.name}.",
        f"K_ref = {kin.k_ref_um3_per_day:.4g} um^3/day at {kin.ref_temp_c} C; 90 % range K / {kin.rate_factor_90:.2f} "
        f".. K x {kin.rate_factor_90:.2f}; temperature dependence kept from the base profile.",
        "Texture-quality parameters only; not a food-safety profile.",
    ]
    _write_profile(out_path, prof, header)
    if as_json:
        click.echo(json.dumps({"profile": prof.as_dict(), "out": str(out_path)}, indent=2))
        return
    for line in header[:2]:
        click.echo(line)
    click.echo(f"Wrote {out_path} (use it with --profile {out_path}).")
