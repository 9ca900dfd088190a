"""`watcher replay` and `watcher import`: recorded readings, or a data logger's export, through
the same engine as the live service."""

from __future__ import annotations

import math
import time
from collections import Counter
from collections.abc import Iterable, Iterator
from contextlib import closing
from pathlib import Path

from watcher.config import Config
from watcher.engine.batch import Engine
from watcher.errors import SeriesError
from watcher.files.csvtable import iter_rows, number
from watcher.files.logger import ColumnMap, read_export
from watcher.files.series import parse_time
from watcher.ingest.payload import SIGNALS, TEMPERATURE_SIGNALS, Reading
from watcher.store.db import Store
from watcher.store.staging import Staging

BATCH = 5000
#: A long replay is checkpointed every this many readings, as the service checkpoints as it
#: goes: model state saved, snapshots taken, events analysed, and memory flat for any length.
CHECKPOINT_READINGS = 200_000


def iter_readings(cfg: Config, path: str) -> Iterator[Reading]:
    """The file's readings, each checked, as they are read (memory flat for any file size)."""
    _, rows = iter_rows(path, ("time", "zone", "signal", "value"), SeriesError)
    zones = {z.id for z in cfg.zones}
    lo, hi = cfg.ingest.limits.temp_range_c
    with closing(rows):  # an error mid-file closes the file at once
        for line, row in rows:
            where = f"{path}: line {line}"
            zone = (row.get("zone") or "").strip()
            if zone not in zones:
                raise SeriesError(
                    f"{where}, column zone", zone, "one of the configured zones: " + ", ".join(sorted(zones))
                )
            signal = (row.get("signal") or "").strip()
            if signal not in SIGNALS:
                raise SeriesError(f"{where}, column signal", signal, "one of " + ", ".join(SIGNALS))
            value = number(row.get("value"), f"{where}, column value", SeriesError)
            if signal in TEMPERATURE_SIGNALS and not lo <= value <= hi:
                raise SeriesError(f"{where}, column value", value, f"a temperature in [{lo}, {hi}] C")
            sensor = (row.get("sensor") or "").strip() or signal
            ts = parse_time(row.get("time"), f"{where}, column time")
            if not math.isfinite(ts):
                raise SeriesError(f"{where}, column time", row.get("time"), "a finite time")
            yield Reading(zone, sensor, signal, round(ts, 3), value)


def replay_file(cfg: Config, path: str, progress=None) -> Counter:
    topic = f"replay:{path}"
    return feed(cfg, ((r, topic) for r in iter_readings(cfg, path)), "replaying", progress)


def feed(cfg: Config, items: Iterable[tuple[Reading, str]], label: str, progress=None, refused=()) -> Counter:
    """(reading, topic) pairs through the service's engine in time order, in batches, with a
    progress bar for long inputs; `refused` rows (topic, reason, row), which may be filled as
    the items are read, are stored as rejections in the same record. Returns the engine's
    counts.

    The pairs are staged on disk first (store/staging.py): every one is read and checked
    before any reaches the record, and they come back in time order with memory flat."""
    counts: Counter = Counter()
    with Staging(cfg.storage.path) as stage:
        stage.add((r.zone, r.sensor, r.signal, r.ts, r.value, topic) for r, topic in items)
        store = Store.configured(cfg.storage)
        try:
            engine = Engine(cfg, store, checkpoint_s=math.inf)
            now = time.time()
            if refused:
                with store.atomic():
                    for topic, reason, row in refused:
                        store.rejections.add(now, topic, reason, row.encode())
                counts["refused"] += len(refused)
            batches = stage.in_time_order(BATCH)
            n_batches = -(-stage.count // BATCH)
            bar = progress(batches, label=label, length=n_batches) if progress and stage.count > 5 * BATCH else None
            iterator = bar.__enter__() if bar else batches
            try:
                since = 0
                for rows in iterator:
                    batch = [(Reading(z, s, sig, ts, v), now, topic) for z, s, sig, ts, v, topic in rows]
                    counts.update(engine.process_readings(batch, now).counts)
                    since += len(batch)
                    if since >= CHECKPOINT_READINGS:
                        engine.checkpoint_all(now, final=False)
                        since = 0
            finally:
                if bar:
                    bar.__exit__(None, None, None)
            engine.checkpoint_all(now)
        finally:
            store.close()
    return counts


def import_export(cfg: Config, path: str, cmap: ColumnMap, time_format: str | None = None, progress=None):
    """A data logger's export into the record (files/logger.py reads it): each good row a
    reading of cmap's zone, signal and sensor; each refused row a rejection saying why.
    Returns (engine counts, the export as read, refused rows)."""
    zones = {z.id for z in cfg.zones}
    zone = cmap.zone or (next(iter(zones)) if len(zones) == 1 else None)
    if zone not in zones:
        raise SeriesError("--map zone", cmap.zone, "one of the configured zones: " + ", ".join(sorted(zones)))
    if cmap.signal not in SIGNALS:
        raise SeriesError("--map signal", cmap.signal, "one of " + ", ".join(SIGNALS))
    export = read_export(path, cmap, cfg.site_of(zone).timezone, time_format)
    sensor = cmap.sensor or Path(path).stem
    topic = f"import:{Path(path).name}"
    lo, hi = cfg.ingest.limits.temp_range_c
    refused: list[tuple[str, str, str]] = []  # filled as the rows are read; stored after them

    def items() -> Iterator[tuple[Reading, str]]:
        for line, ts, value, row, why in export.records():
            if why is None and cmap.signal in TEMPERATURE_SIGNALS:
                value = (value - 32.0) * 5.0 / 9.0 if cmap.unit == "F" else value
                if not lo <= value <= hi:
                    why = f"temperature {value:.2f} C outside [{lo}, {hi}] (sensor fault?)"
            elif why is None and value not in (0.0, 1.0):
                why = f"state {value:g} is not 0 or 1"
            if why is not None:
                refused.append((topic, f"line {line}: {why}", row))
                continue
            yield Reading(zone, sensor, cmap.signal, round(ts, 3), value), topic

    counts = feed(cfg, items(), "importing", progress, refused)
    return counts, export, refused
