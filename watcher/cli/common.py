"""What the commands share: the --config and --db options, time stamps, number formats and
one table printer (tabulate), so long values widen a column instead of breaking the row."""

from __future__ import annotations

import os
import shlex
import shutil
import sys
from datetime import datetime
from pathlib import Path
from zoneinfo import ZoneInfo

import click
from tabulate import tabulate

from watcher.errors import InputError


def config_option():
    """--config FILE, required: the service configuration."""
    return click.option(
        "--config",
        "config_path",
        required=True,
        type=click.Path(dir_okay=False),
        help="Service configuration TOML (see config.example.toml).",
    )


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


def open_record(config_path: str | None, db_path: str | None, readonly: bool = False):
    """The record a command opens: --db, else the configuration's, else the default."""
    from watcher.config import open_record as opened

    return opened(config_path, db_path, readonly)


def stamp(time_ts: float, tz: str = "UTC", seconds: bool = False) -> str:
    """An instant to the minute (or second) in a site's time zone, the zone named ("2026-12-02 15:40 GMT")."""
    return datetime.fromtimestamp(time_ts, tz=ZoneInfo(tz)).strftime(f"%Y-%m-%d %H:%M{':%S' if seconds else ''} %Z")


def _reader_site(cfg, zone: str | None):
    """The site whose conventions a person reads: the zone's, else the only site, else none."""
    if cfg is None:
        return None
    if zone is not None and cfg.zone(zone) is not None:
        return cfg.site_of(zone)
    return cfg.sites[0] if len(cfg.sites) == 1 else None


def site_tz(cfg, zone: str | None = None) -> str:
    """The time zone a person reads times in (UTC without a site)."""
    site = _reader_site(cfg, zone)
    return "UTC" if site is None else site.timezone


def site_unit(cfg, zone: str | None = None) -> str:
    """The temperature unit a person reads, C or F (C without a site)."""
    site = _reader_site(cfg, zone)
    return "C" if site is None else site.temp_unit


def typed_time(raw: str, tz: str, where: str) -> float:
    """A time typed by a person: ISO 8601 (a date alone is its midnight) or epoch seconds; one
    without a zone is in the site's time zone tz, not UTC."""
    from watcher.files.series import parse_time

    try:
        return parse_time(raw, where, tz)
    except InputError:
        raise InputError(
            where,
            raw,
            f"a time such as 2026-11-30 or 2026-11-30T08:00 (site time, {tz}), with an offset such as +01:00, "
            "or epoch seconds",
        ) from None


def fmt(value, spec: str, none: str = "-") -> str:
    """value formatted by spec, or `none` when missing."""
    return none if value is None else format(value, spec)


def table(rows: list[list], head: list[str], align: list[str] | None = None) -> str:
    """A plain-text table: a header, a rule, one line per row; columns as wide as their widest
    value. align: 'left' or 'right' per column (default: numbers right, text left)."""
    return tabulate(rows, headers=head, tablefmt="simple", colalign=align, disable_numparse=True)


def self_command() -> str:
    """How to run watcher again the way it was started: `watcher` when that is on PATH and is
    this program, else the path it was started by (or `python -m watcher`)."""
    argv0 = sys.argv[0] if sys.argv else ""
    if not argv0 or argv0.endswith("__main__.py") or argv0 == "-m":
        return f"{shlex.quote(sys.executable)} -m watcher"
    found = shutil.which("watcher")
    if found and Path(found).resolve() == Path(argv0).resolve():
        return "watcher"
    rel = os.path.relpath(argv0)
    return shlex.quote(argv0 if rel.startswith("..") else rel)
