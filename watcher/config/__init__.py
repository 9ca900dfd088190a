"""Service configuration: TOML in, frozen settings out, validated once (config/load.py).

Every refusal raises ConfigError naming the file, the key path, the value and what was
expected; the CLI turns it into exit code 2. Settings are declared once beside their types
(watcher.declare); docs/configuration.md is generated from the same declarations.
"""

from watcher.config.load import config_from_dict, load_config
from watcher.config.record import open_record
from watcher.config.settings import (
    WEEKDAYS,
    Alerting,
    Config,
    Events,
    Health,
    Ingest,
    Reports,
    Site,
    Storage,
    Zone,
    default_db_path,
    default_reports_dir,
)

__all__ = [
    "WEEKDAYS",
    "Alerting",
    "Config",
    "Events",
    "Health",
    "Ingest",
    "Reports",
    "Site",
    "Storage",
    "Zone",
    "config_from_dict",
    "default_db_path",
    "default_reports_dir",
    "load_config",
    "open_record",
]
