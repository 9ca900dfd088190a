"""The `watcher` command: a thin layer of click commands over the library.

Every WatcherError becomes one line on stderr and its exit code (2 for bad input).
"""

from __future__ import annotations

import json
import sys
from datetime import UTC, datetime
from pathlib import Path

import click

from watcher import __version__
from watcher.errors import ProfileError, WatcherError
from watcher.ranges import figure_text


class _Group(click.Group):
    """Turns watcher's own errors into a clear message and exit code, never a traceback."""

    def invoke(self, ctx):
        try:
            return super().invoke(ctx)
        except WatcherError as exc:
            click.echo(f"watcher: error: {exc}", err=True)
            sys.exit(exc.exit_code)


@click.group(cls=_Group)
@click.version_option(__version__, prog_name="watcher")
def main() -> None:
    """Ice-crystal coarsening watch for frozen-dessert cold stores."""


def _stamp(t_s: float) -> str:
    return datetime.fromtimestamp(t_s, tz=UTC).strftime("%Y-%m-%d %H:%M UTC")


def _fmt(value, spec: str, none: str = "-") -> str:
    return none if value is None else format(value, spec)


def _figure_table(rows: dict[str, dict]) -> list[str]:
    head = f"{'position':<10} {'state':<7} {'product C':>9} {'mean um':>8} {'d90 um':>7} {'>limit vol%':>11} {'budget %':>9} {'um/day':>7} {'days left':>9} {'vs setpoint um':>14}"
    out = [head, "-" * len(head)]
    for name, r in rows.items():
        share = None if r["share_above_limit"] is None else 100 * r["share_above_limit"]
        out.append(
            f"{name:<10} {r['state']:<7} {_fmt(r['product_c'], '9.1f'):>9} {_fmt(r['mean_diameter_um'], '8.1f'):>8} "
            f"{_fmt(r['d90_um'], '7.1f'):>7} {_fmt(share, '11.1f'):>11} {_fmt(r['budget_used_pct'], '9.1f'):>9} "
            f"{_fmt(r['growth_rate_um_per_day'], '7.3f'):>7} {_fmt(r['days_to_limit'], '9.1f', 'never'):>9} "
            f"{_fmt(r['excess_growth_um'], '+14.2f'):>14}"
        )
    return out


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
    days = (result["end_s"] - result["start_s"]) / 86400.0
    click.echo(
        f"Series   {series_path}: {result['samples']} samples, {_stamp(result['start_s'])} to {_stamp(result['end_s'])} ({days:.1f} days)"
    )
    click.echo(
        f"Profile  {result['profile']}; setpoint {result['setpoint_c']:.1f} C; texture limit {result['limit_mean_diameter_um']:.0f} um mean diameter"
    )
    click.echo("")
    for line in _figure_table(result["positions"]):
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
        f"The additive rule (sum of time / life at each temperature) would say {_fmt(w['additive_rule_budget_pct'], '.1f')} %:"
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
    help="With --life: the 90 %% range factor of the rate (default: the base profile's).",
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


@main.command()
@click.option("--out", "out_dir", default="watcher-demo", show_default=True, help="Folder for the database and report.")
@click.option("--no-broker", is_flag=True, help="Feed the engine in this process even when mosquitto is installed.")
@click.option("--now", "now_s", type=float, default=None, hidden=True, help="End of the demo data (epoch s; tests).")
def demo(out_dir, no_broker, now_s) -> None:
    """Run the whole pipeline on a fictional cold store: about two weeks in under a minute."""
    import logging
    import time

    from watcher.demo_run import run
    from watcher.simulation import CAUTION

    logging.basicConfig(level=logging.ERROR)  # the demo prints alerts itself
    shown, began = [0.0], time.monotonic()

    def progress(share: float) -> None:
        if share - shown[0] >= 0.1 or share >= 1.0 and shown[0] < 1.0:
            click.echo(f"  ... {share:4.0%} of the messages stored ({time.monotonic() - began:.0f} s)", err=True)
            shown[0] = share

    result = run(out_dir, not no_broker, click.echo, progress, now_s)
    click.echo("")
    click.echo(f"Done in {result['seconds']:.0f} s.")
    click.echo(f"Weekly summary for {result['week']}: {result['report']}")
    click.echo(f"Database: {result['database']}   Configuration: {result['config']}")
    click.echo("Try next:")
    click.echo(f"  watcher status --config {result['config']}")
    click.echo(f"  watcher alerts --config {result['config']}")
    click.echo(f"  watcher lots --config {result['config']}")
    click.echo(f"  watcher report --config {result['config']} --week {result['week']}")
    click.echo(f"  watcher verify --config {result['config']}")
    click.echo(CAUTION)


def _config_option():
    return click.option(
        "--config",
        "config_path",
        required=True,
        type=click.Path(dir_okay=False),
        help="Service configuration TOML (see config.example.toml).",
    )


@main.command("check-config")
@click.argument("config_path", metavar="FILE", type=click.Path(dir_okay=False))
def check_config(config_path) -> None:
    """Validate a configuration file and show what would be subscribed and how topics map."""
    from watcher.config import load_config

    cfg = load_config(config_path)
    click.echo(f"{config_path}: valid.")
    click.echo(
        f"Broker   {cfg.broker.host}:{cfg.broker.port} as {cfg.broker.client_id!r}"
        f"{' with TLS' if cfg.broker.tls else ''}{', user ' + cfg.broker.username if cfg.broker.username else ''}; "
        f"status on {cfg.broker.status_topic} (retained)"
    )
    click.echo(f"Database {cfg.storage.path}; raw readings kept {cfg.storage.raw_retention_days} days")
    click.echo("")
    click.echo("Subscriptions (QoS 1) and how each topic maps:")
    for s in cfg.sources:
        zone = "{zone} level" if "zone" in s.pattern.placeholders else f"zone {s.zone}"
        sensor = "{sensor} level" if "sensor" in s.pattern.placeholders else f"sensor {s.sensor or s.signal}"
        value = "plain number" if s.fmt == "number" else f"JSON field {'.'.join(s.value_path)}"
        when = (
            "receive time (retained messages refused)"
            if s.time_path is None
            else f"JSON field {'.'.join(s.time_path)} ({s.time_format})"
        )
        unit = f" in {s.unit}" if s.signal in ("air_c", "product_c") else ""
        click.echo(f"  {s.pattern.filter:<32} {s.signal:<9} {zone}; {sensor}; value: {value}{unit}; time: {when}")
    click.echo("")
    click.echo("Zones:")
    for z in cfg.zones:
        pos = ", ".join(p.name + (" (probe)" if p.probe else f" (tau {p.tau_s / 3600:g} h)") for p in z.positions)
        click.echo(
            f"  {z.id:<12} {z.name} @ {z.site}: setpoint {z.setpoint_c:g} C, profile {z.profile.name}, positions {pos}"
        )


@main.command()
@_config_option()
@click.option("--log-level", default="INFO", show_default=True, help="DEBUG, INFO, WARNING or ERROR.")
def run(config_path, log_level) -> None:
    """Run the service in the foreground (systemd runs it as Type=notify)."""
    from watcher.config import load_config
    from watcher.service import Service, setup_logging

    setup_logging(log_level)
    cfg = load_config(config_path)
    sys.exit(Service(cfg).run_forever())


def db_options(func):
    """--config / --db for the commands that read (or queue into) the service's database."""
    func = click.option(
        "--db",
        "db_path",
        default=None,
        type=click.Path(dir_okay=False),
        help="Database file (default: from --config, else $STATE_DIRECTORY/watcher.db or ./watcher.db).",
    )(func)
    return click.option(
        "--config",
        "config_path",
        default=None,
        type=click.Path(dir_okay=False),
        help="Take the database path from this configuration.",
    )(func)


@main.command()
@db_options
@click.option("--json", "as_json", is_flag=True, help="Print JSON.")
def status(config_path, db_path, as_json) -> None:
    """Show each zone's temperatures, crystal size, budget and data freshness (read-only)."""
    from watcher.status import read_status

    report = read_status(config_path, db_path)
    if as_json:
        click.echo(json.dumps(report, indent=2))
        return
    click.echo(f"Database {report['database']} (read-only), as of {_stamp(report['now_s'])}")
    head = f"{'zone':<12} {'air C':>6} {'product C':>9} {'mean um':>8} {'budget % (90 % range)':>22} {'days left (range)':>20} {'last reading':>13} {'readings':>9}  data"
    click.echo(head)
    click.echo("-" * len(head))
    for z in report["zones"]:
        age = z["last_reading_age_s"]
        age_txt = (
            "-"
            if age is None
            else (
                f"{age:.0f} s ago"
                if age < 120
                else f"{age / 60:.0f} min ago"
                if age < 7200
                else f"{age / 3600:.1f} h ago"
            )
        )
        data = "no data" if age is None else "gap open" if z["open_gap"] else "ok"
        days_none = "never" if z["state"] == "frozen" else "-"  # 'never': no coarsening below Tg'; '-': no figures yet
        click.echo(
            f"{z['id']:<12} {_fmt(z['air_c'], '6.1f'):>6} {_fmt(z['product_c'], '9.1f'):>9} {_fmt(z['mean_diameter_um'], '8.1f'):>8} "
            f"{figure_text(z, 'budget_used_pct', '.1f'):>22} "
            f"{figure_text(z, 'days_to_limit', '.0f', days_none):>20} {age_txt:>13} {z['readings_total']:>9}  {data}"
        )
    click.echo(
        "Days left: if the product stayed at its current temperature. Ranges: 90 % range from the profile's "
        "uncertainty; alerts on days left use the cautious (lower) end."
    )
    click.echo(f"Rejected messages stored: {report['rejections_total']}; data gaps recorded: {report['gaps_total']}.")
    alerts = report["open_alerts"]
    if alerts:
        click.echo(f"Open alerts ({len(alerts)}; `watcher alerts --open` for more):")
        for a in alerts[:10]:
            ack = f", acknowledged by {a['acked_by']}" if a["acked_by"] else ""
            click.echo(f"  {a['id']:>5} {a['severity']:<8} {a['zone']:<12} {a['label']}{ack}")
    else:
        click.echo("No open alerts.")
    from watcher.simulation import CAUTION

    click.echo(CAUTION)


@main.command()
@_config_option()
@click.argument("readings_path", metavar="READINGS.csv", type=click.Path(dir_okay=False))
def replay(config_path, readings_path) -> None:
    """Run recorded readings (CSV: time,zone,signal,value[,sensor]) through the service's engine."""
    from watcher.config import load_config
    from watcher.replay import replay_file

    cfg = load_config(config_path)
    counts = replay_file(cfg, readings_path, progress=click.progressbar)
    click.echo(", ".join(f"{k}: {v}" for k, v in sorted(counts.items())) or "nothing to replay")
    click.echo(f"Database {cfg.storage.path}; see `watcher status --config {config_path}`.")


from watcher import cli_alerts, cli_lots, cli_whatif  # noqa: E402,F401  (register the other commands)
