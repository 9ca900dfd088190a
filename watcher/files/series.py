"""Temperature series CSV: columns `time` (ISO 8601 or epoch seconds), `air_c`, optional
`product_c` (a product probe; empty cells mean no reading). Times without an offset are UTC."""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import UTC, datetime
from zoneinfo import ZoneInfo

import numpy as np

from watcher.errors import SeriesError
from watcher.files.csvtable import number, read_rows

#: Physically possible air temperatures for a cold store sensor, degC.
AIR_RANGE_C = (-80.0, 60.0)


@dataclass(frozen=True)
class Series:
    time_ts: np.ndarray
    air_c: np.ndarray
    product_c: np.ndarray | None


def parse_time(raw: str, where: str, tz: str = "UTC") -> float:
    """Epoch seconds from ISO 8601 or a plain epoch-seconds number; an ISO time without an
    offset is in tz (UTC for files, the site's zone for what a person types)."""
    text = (raw or "").strip()
    if not text:
        raise SeriesError(where, raw, "a time (ISO 8601 or epoch seconds)")
    try:
        value = float(text)
    except ValueError:
        value = None
    if value is not None:
        if not math.isfinite(value):
            raise SeriesError(where, raw, "a finite epoch-seconds value")
        return value
    try:
        stamp = datetime.fromisoformat(text.replace("Z", "+00:00") if text.endswith("Z") else text)
    except ValueError:
        raise SeriesError(where, raw, "an ISO 8601 time such as 2026-11-30T08:00:00Z, or epoch seconds") from None
    if stamp.tzinfo is None:
        stamp = stamp.replace(tzinfo=UTC if tz == "UTC" else ZoneInfo(tz))
    return stamp.timestamp()


def read_series(path: str) -> Series:
    header, rows = read_rows(path, ("time", "air_c"), SeriesError)
    has_probe = "product_c" in header
    t = np.empty(len(rows))
    air = np.empty(len(rows))
    probe = np.full(len(rows), np.nan)
    lo, hi = AIR_RANGE_C
    for i, (line, row) in enumerate(rows):
        t[i] = parse_time(row.get("time"), f"{path}: line {line}, column time")
        air[i] = number(row.get("air_c"), f"{path}: line {line}, column air_c", SeriesError)
        if not lo <= air[i] <= hi:
            raise SeriesError(f"{path}: line {line}, column air_c", air[i], f"a temperature in [{lo}, {hi}] C")
        if has_probe:
            probe[i] = number(
                row.get("product_c"), f"{path}: line {line}, column product_c", SeriesError, allow_empty=True
            )
        if i and t[i] <= t[i - 1]:
            raise SeriesError(
                f"{path}: line {line}, column time",
                row.get("time"),
                "a time later than the previous row (times must increase)",
            )
    if len(rows) < 2:
        raise SeriesError(str(path), f"{len(rows)} row", "at least two rows")
    return Series(t, air, probe if has_probe else None)
