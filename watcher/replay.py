"""`watcher replay`: recorded readings through the same engine as the live service."""

from __future__ import annotations

import math
import time
from collections import Counter

from watcher.config import Config
from watcher.engine.batch import Engine
from watcher.errors import SeriesError
from watcher.files.csvtable import number, read_rows
from watcher.files.series import parse_time
from watcher.ingest.payload import SIGNALS, TEMPERATURE_SIGNALS, Reading
from watcher.store.db import Store

BATCH = 5000


def read_readings(cfg: Config, path: str) -> list[Reading]:
    header, rows = read_rows(path, ("time", "zone", "signal", "value"), SeriesError)
    zones = {z.id for z in cfg.zones}
    lo, hi = cfg.ingest.limits.temp_range_c
    out = []
    for line, row in rows:
        where = f"{path}: line {line}"
        zone = (row.get("zone") or "").strip()
        if zone not in zones:
            raise SeriesError(f"{where}, column zone", zone, "one of the configured zones: " + ", ".join(sorted(zones)))
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
        out.append(Reading(zone, sensor, signal, round(ts, 3), value))
    return out


def replay_file(cfg: Config, path: str, progress=None) -> Counter:
    readings = read_readings(cfg, path)
    readings.sort(key=lambda r: r.ts)
    store = Store(cfg.storage.path)
    counts: Counter = Counter()
    try:
        engine = Engine(cfg, store, checkpoint_s=math.inf)
        topic = f"replay:{path}"
        now = time.time()
        chunks = range(0, len(readings), BATCH)
        bar = (
            progress(chunks, label="replaying", length=len(chunks)) if progress and len(readings) > 5 * BATCH else None
        )
        iterator = bar.__enter__() if bar else chunks
        try:
            for lo in iterator:
                result = engine.process_readings([(r, now, topic) for r in readings[lo : lo + BATCH]], now)
                counts.update(result.counts)
        finally:
            if bar:
                bar.__exit__(None, None, None)
        engine.checkpoint_all(now)
    finally:
        store.close()
    return counts
