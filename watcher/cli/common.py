"""What the commands share: the --config and --db options, time stamps, number formats and
one table printer (tabulate), so long values widen a column instead of breaking the row."""

from __future__ import annotations

import os
import shlex
import shutil
import sys
from datetime import UTC, datetime
from pathlib import Path

import click
from tabulate import tabulate


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


def database_of(config_path: str | None, db_path: str | None) -> str:
    """The database a read-only command opens: --db, else the configuration's, else the default."""
    from watcher.config import default_db_path, load_config

    if db_path:
        return db_path
    return load_config(config_path).storage.path if config_path else default_db_path()


def stamp(time_ts: float) -> str:
    """An instant as UTC minutes."""
    return datetime.fromtimestamp(time_ts, tz=UTC).strftime("%Y-%m-%d %H:%M UTC")


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
