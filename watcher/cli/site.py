"""`watcher demo`, `check-config`, `run`, `status` and `replay`: the service and its record."""

from __future__ import annotations

import json
import shlex
import sys

import click

from watcher.alerts.metrics import temperature
from watcher.cli.app import main
from watcher.cli.common import config_option, db_options, self_command, site_tz, site_unit, stamp, table
from watcher.errors import WatcherError
from watcher.ingest.payload import FORMATS


@main.command()
@click.option("--out", "out_dir", default="watcher-demo", show_default=True, help="Folder for the database and report.")
@click.option("--no-broker", is_flag=True, help="Feed the engine in this process even when mosquitto is installed.")
@click.option("--now", "now_ts", type=float, default=None, hidden=True, help="End of the demo data (epoch s; tests).")
def demo(out_dir, no_broker, now_ts) -> None:
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

    result = run(out_dir, not no_broker, click.echo, progress, now_ts)
    click.echo("")
    click.echo(f"Done in {result['seconds']:.0f} s.")
    click.echo(f"Weekly summary for {result['week']}: {result['report']}")
    click.echo(f"Database: {result['database']}   Configuration: {result['config']}")
    click.echo("Try next:")
    me, config = self_command(), shlex.quote(result["config"])
    for args in ("status", "alerts", "lots", f"report --week {result['week']}", "verify"):
        verb, _, rest = args.partition(" ")
        click.echo(f"  {me} {verb} --config {config}" + (f" {rest}" if rest else ""))
    click.echo(CAUTION)


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
    click.echo(f"Database {cfg.storage.record}; raw readings kept {cfg.storage.raw_retention_days} days")
    click.echo("")
    click.echo("Subscriptions (QoS 1) and how each topic maps:")
    for s in cfg.sources:
        zone = "{zone} level" if "zone" in s.pattern.placeholders else f"zone {s.zone}"
        sensor = "{sensor} level" if "sensor" in s.pattern.placeholders else f"sensor {s.sensor or s.signal}"
        value = FORMATS[s.fmt].describe(s)
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
    _show_channels_and_rules(cfg)
    click.echo(f"Try the live topics before going live: watcher listen --config {shlex.quote(str(config_path))}")


def _show_channels_and_rules(cfg) -> None:
    from watcher.alerts.messages import fmt_value
    from watcher.alerts.metrics import duration
    from watcher.alerts.secrets import mask_url

    click.echo("")
    click.echo("Notification channels (secrets masked):")
    for c in cfg.channels:
        click.echo(f"  {c.name:<14} {mask_url(c.url)}  tags: {', '.join(c.tags)}")
    if not cfg.channels:
        click.echo("  none: alerts and summaries are recorded, and sent nowhere")
    click.echo("")
    click.echo("Alert rules:")
    rows = []
    for r in cfg.alerting.rules:
        held = f" for {duration(r.for_s)}" if r.for_s else ""
        where = ", ".join(r.zones) if r.zones else "every zone"
        side = "at or above" if r.op == ">=" else "at or below"
        rows.append([r.id, r.severity, f"{r.metric} {side} {fmt_value(r.metric, r.threshold)}{held}", where])
    click.echo(table(rows, ["rule", "severity", "raised when", "applies to"], ["left"] * 4))


@main.command()
@config_option()
@click.option(
    "--seconds", type=click.FloatRange(0.5, 86400.0), default=60.0, show_default=True, help="How long to listen."
)
def listen(config_path, seconds) -> None:
    """Show what each live message would become (the reading, or why it would be refused),
    on a separate session, storing nothing."""
    from watcher.config import load_config
    from watcher.listen import SIGNAL_WORDS, SWITCH_WORDS
    from watcher.listen import listen as watch

    cfg = load_config(config_path)
    counts: dict[str, int] = {}

    def show(msg, kind, reading, why) -> None:
        counts[kind] = counts.get(kind, 0) + 1
        tz = site_tz(cfg, reading.zone if reading else None)
        head = f"{stamp(msg.received_ts, tz, seconds=True)}  {msg.topic}"
        if reading is None:
            click.echo(f"{head}\n    {kind}: {why}")
            return
        unit = site_unit(cfg, reading.zone)
        if reading.signal in ("door", "defrost"):
            value = SWITCH_WORDS[reading.signal][reading.value >= 0.5]
        else:
            value = temperature(reading.value, unit)
        click.echo(
            f"{head}\n    reading: zone {reading.zone}, sensor {reading.sensor}, {SIGNAL_WORDS[reading.signal]} "
            f"{value}, at {stamp(reading.ts, tz, seconds=True)}"
        )

    click.echo(f"Listening for {seconds:g} s on {cfg.broker.host}:{cfg.broker.port} (nothing is stored) ...")
    try:
        seen = watch(cfg, seconds, show, lambda: click.echo("Subscribed; messages as they arrive:"))
    except ConnectionError as exc:
        raise click.ClickException(str(exc)) from None
    kinds = {
        "reading": "would be stored",
        "refused": "would be refused",
        "held": "would be held",
        "command": "commands",
        "birth": "Sparkplug births",
    }
    summary = "; ".join(f"{counts[k]} {words}" for k, words in kinds.items() if k in counts) or "nothing arrived"
    click.echo(f"{seen} messages: {summary}.")


@main.command()
@config_option()
@click.option("--log-level", default="INFO", show_default=True, help="DEBUG, INFO, WARNING or ERROR.")
def run(config_path, log_level) -> None:
    """Run the service in the foreground (systemd runs it as Type=notify)."""
    from watcher.config import load_config
    from watcher.service import Service
    from watcher.systemd import setup_logging

    setup_logging(log_level)
    cfg = load_config(config_path)
    sys.exit(Service(cfg).run_forever())


@main.command()
@db_options
@click.option("--json", "as_json", is_flag=True, help="Print JSON.")
@click.option("--all-sites", is_flag=True, help="One line a site first, then each site's zones (a central watcher).")
def status(config_path, db_path, as_json, all_sites) -> None:
    """Show each zone's temperatures, crystal size, budget and data freshness (read-only)."""
    from watcher.cli.status_view import show
    from watcher.config import load_config
    from watcher.status import read_status

    report = read_status(config_path, db_path)
    if as_json:
        click.echo(json.dumps(report, indent=2))
        return
    show(report, load_config(config_path) if config_path else None, all_sites)
    from watcher.simulation import CAUTION

    click.echo(CAUTION)


@main.command()
@config_option()
@click.argument("readings_path", metavar="READINGS.csv", type=click.Path(dir_okay=False))
def replay(config_path, readings_path) -> None:
    """Run recorded readings (CSV: time,zone,signal,value[,sensor]) through the service's engine."""
    from watcher.config import load_config
    from watcher.replay import replay_file

    cfg = load_config(config_path)
    counts = replay_file(cfg, readings_path, progress=click.progressbar)
    click.echo(", ".join(f"{k}: {v}" for k, v in sorted(counts.items())) or "nothing to replay")
    click.echo(f"Database {cfg.storage.record}; see `watcher status --config {config_path}`.")


@main.command("import")
@config_option()
@click.argument("export_path", metavar="EXPORT.csv", type=click.Path(dir_okay=False))
@click.option(
    "--map",
    "mapping",
    required=True,
    help="Columns and meaning: time=COL,value=COL[,unit=C|F][,zone=ID][,signal=air_c][,sensor=NAME].",
)
@click.option("--time-format", default=None, help="The export's time format (strptime), e.g. '%d.%m.%Y %H:%M'.")
def import_cmd(config_path, export_path, mapping, time_format) -> None:
    """Bring a data logger's CSV export into the record (its own delimiter, decimal commas and
    time format; times without a zone are site time), through the service's engine."""
    from watcher.config import load_config
    from watcher.files.logger import parse_map
    from watcher.replay import import_export

    cfg = load_config(config_path)
    counts, export, refused = import_export(cfg, export_path, parse_map(mapping), time_format, click.progressbar)
    taken = sum(counts.get(k, 0) for k in ("accepted", "late"))
    click.echo(
        f"Read {export_path}: delimiter {export.delimiter!r}, times as {export.time_format!r} in site time; "
        f"{taken} readings taken ({counts.get('accepted', 0)} new, {counts.get('late', 0)} late), "
        f"{counts.get('duplicate', 0)} already in the record, {len(refused)} rows refused."
    )
    for _, reason, _ in refused[:10]:
        click.echo(f"  refused {reason}")
    if len(refused) > 10:
        click.echo(f"  ... and {len(refused) - 10} more (all kept in the rejections table)")
    if not taken and not counts.get("duplicate") and refused:
        sys.exit(1)


@main.command()
@click.option(
    "--out",
    "out_path",
    default="watcher.toml",
    show_default=True,
    type=click.Path(dir_okay=False),
    help="The configuration file to write (its secrets go in secrets/ beside it).",
)
@click.option("--site-id", default=None, help="A short id: letters, digits, '-' and '_'.")
@click.option("--site-name", default=None, help="The site's name in messages and summaries.")
@click.option("--timezone", default=None, help="IANA time zone, e.g. Europe/London.")
@click.option("--zone", "zones", multiple=True, help="ID:SETPOINT_C[:NAME], e.g. 'bulk-a:-25:Bulk store A' (repeat).")
@click.option(
    "--product",
    default=None,
    help="The product profile the zones hold: a shipped name (watcher profile list) or a TOML file "
    "(default dairy-ice-cream).",
)
@click.option("--broker", default=None, help="HOST[:PORT] of the site broker (default 127.0.0.1:1883).")
@click.option("--tls-ca", default=None, help="The broker's CA certificate file, for TLS.")
@click.option(
    "--air-topic", default=None, help="Topic pattern of the air readings (default {site}/{zone}/{sensor}/air)."
)
@click.option(
    "--format",
    "air_format",
    type=click.Choice(["json", "number", "text"]),
    default=None,
    help='How the air payloads are written (default json: {"temp": -24.6, "ts": ...}).',
)
@click.option("--door-topic", default=None, help="Topic pattern of door contacts publishing open/closed (optional).")
@click.option(
    "--channel", "channels", multiple=True, help="A notification channel's name (repeat); its URL goes in a file."
)
@click.option("--ask", is_flag=True, help="Ask for every answer not given (the default at a terminal).")
@click.option("--force", is_flag=True, help="Overwrite an existing file.")
def init(
    out_path,
    site_id,
    site_name,
    timezone,
    zones,
    product,
    broker,
    tls_ca,
    air_topic,
    air_format,
    door_topic,
    channels,
    ask,
    force,
):
    """Write a starter configuration for a new site from a few answers (or flags, for scripts),
    then check it as check-config does."""
    import os
    from pathlib import Path

    from watcher.config.starter import Answers, parse_zone, starter_toml

    ask = ask or sys.stdin.isatty()

    def answer(value, question, default):
        if value is not None:
            return value
        return click.prompt(question, default=default) if ask else default

    out = Path(out_path)
    if out.exists() and not force:
        click.echo(f"watcher: error: {out} exists; give --force to overwrite it", err=True)
        sys.exit(2)
    site_id = answer(site_id, "Site id (letters, digits, - and _)", "site")
    site_name = answer(site_name, "Site name", site_id)
    timezone = answer(timezone, "Time zone (IANA)", "UTC")
    if not zones and ask:
        zones = tuple(
            z.strip()
            for z in click.prompt("Zones as ID:SETPOINT_C[:NAME], comma-separated", default="store:-25").split(",")
        )
    if not zones:
        click.echo("watcher: error: --zone: at least one zone, as ID:SETPOINT_C[:NAME]", err=True)
        sys.exit(2)
    if product is None and ask:
        from watcher.files.profiles import builtin_names

        click.echo("Products: " + ", ".join(builtin_names()) + " (or a profile TOML file)")
    product = answer(product, "Product the zones hold", "dairy-ice-cream")
    from watcher.files.profiles import load_profile

    try:
        load_profile(product)
    except WatcherError as exc:
        click.echo(f"watcher: error: --product: {exc}", err=True)
        sys.exit(2)
    broker = answer(broker, "Broker HOST[:PORT]", "127.0.0.1:1883")
    host, _, port = broker.partition(":")
    try:
        parsed = tuple(parse_zone(z) for z in zones)
        port_n = int(port or (8883 if tls_ca else 1883))
    except ValueError as exc:
        click.echo(f"watcher: error: {exc}", err=True)
        sys.exit(2)
    folder = out.parent.resolve()
    secrets = folder / "secrets"
    secrets.mkdir(mode=0o700, exist_ok=True)
    for name in ("broker-password", *(f"notify-{c}" for c in channels)):
        path = secrets / name
        if not path.exists():
            path.touch(mode=0o600)
            os.chmod(path, 0o600)
    answers = Answers(
        site_id=site_id,
        site_name=site_name,
        timezone=timezone,
        zones=parsed,
        broker_host=host,
        broker_port=port_n,
        password_file=str(secrets / "broker-password"),
        tls_ca=tls_ca,
        air_topic=answer(air_topic, "Air topic pattern", "{site}/{zone}/{sensor}/air"),
        air_format=answer(air_format, "Air payload format (json, number, text)", "json"),
        door_topic=door_topic,
        channels=tuple((c, str(secrets / f"notify-{c}")) for c in channels),
        database=str(folder / "watcher.db"),
        product=product,
    )
    out.write_text(starter_toml(answers), encoding="utf-8")
    click.echo(f"Wrote {out}.")
    empty = [
        p for p in (secrets / "broker-password", *(secrets / f"notify-{c}" for c in channels)) if not p.stat().st_size
    ]
    for path in empty:
        click.echo(f"  {path} (0600) is empty: put the {'password' if 'broker' in path.name else 'URL'} in it")
    if empty:
        _check_with_placeholders(out, empty)
        click.echo(f"Once the files above hold their secrets: watcher check-config {shlex.quote(str(out))}")
        return
    click.echo("")
    click.get_current_context().invoke(check_config, config_path=str(out))


def _check_with_placeholders(out, empty) -> None:
    """Check everything but the secrets not written yet: the same reader, with placeholder
    secrets in a private temporary folder (a refusal exits 2 as check-config does)."""
    import tempfile
    import tomllib
    from pathlib import Path

    from watcher.config import config_from_dict

    data = tomllib.loads(Path(out).read_text(encoding="utf-8"))
    with tempfile.TemporaryDirectory() as tmp:
        swap = {}
        for path in empty:
            stand_in = Path(tmp) / path.name
            stand_in.write_text("placeholder\n" if "broker" in path.name else "json://localhost/placeholder\n")
            stand_in.chmod(0o600)
            swap[str(path)] = str(stand_in)
        data["broker"]["password_file"] = swap.get(data["broker"]["password_file"], data["broker"]["password_file"])
        for ch in data.get("notify", []):
            ch["url_file"] = swap.get(ch["url_file"], ch["url_file"])
        config_from_dict(data, str(out))
    click.echo(f"{out}: valid apart from the secrets still to be written.")
