"""Which record a command opens: --db (a file, or a PostgreSQL URL whose password libpq finds
in ~/.pgpass or PGPASSFILE), else the configuration's [storage], else the default file."""

from __future__ import annotations

from watcher.config.load import load_config
from watcher.config.settings import default_db_path
from watcher.store.db import Store


def open_record(config_path: str | None, db_path: str | None, readonly: bool = False) -> Store:
    if db_path:
        return Store(db_path, readonly=readonly)
    if config_path:
        return Store.configured(load_config(config_path).storage, readonly=readonly)
    return Store(default_db_path(), readonly=readonly)
