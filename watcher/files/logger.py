"""A data logger's CSV export, read as it is: its delimiter (comma, semicolon or tab), decimal
commas, lines of preamble above the header, its own time format (found from the rows, or
given), local times in the site's time zone, a UTF-8 or Windows-1252 file. Each row becomes a
(line, time, value) or a refusal naming the line, the column, the value and what was expected.
"""

from __future__ import annotations

import csv
import math
import re
from collections import Counter
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from zoneinfo import ZoneInfo

from watcher.errors import SeriesError

# Day-first and month-first forms are told apart by the rows; when both read every row, the
# export is ambiguous and --time-format must say which.
TIME_FORMATS = (
    "%Y-%m-%d %H:%M:%S",
    "%Y-%m-%d %H:%M",
    "%Y-%m-%dT%H:%M:%S",
    "%Y-%m-%dT%H:%M",
    "%d.%m.%Y %H:%M:%S",
    "%d.%m.%Y %H:%M",
    "%d/%m/%Y %H:%M:%S",
    "%d/%m/%Y %H:%M",
    "%m/%d/%Y %H:%M:%S",
    "%m/%d/%Y %H:%M",
    "%m/%d/%Y %I:%M:%S %p",
    "%d-%m-%Y %H:%M:%S",
    "%d-%m-%Y %H:%M",
)
_DECIMAL_COMMA = re.compile(r"^[+-−]?\d+,\d+$")


@dataclass(frozen=True)
class ColumnMap:
    time: str
    value: str
    unit: str = "C"  # C or F: the export's temperature unit
    zone: str | None = None
    signal: str = "air_c"
    sensor: str | None = None


@dataclass
class Export:
    rows: list[tuple[int, float, float, str]] = field(default_factory=list)  # (line, epoch s, value, the row)
    refused: list[tuple[int, str, str]] = field(default_factory=list)  # (line, reason, the row as written)
    time_format: str = ""
    delimiter: str = ","


def parse_map(text: str) -> ColumnMap:
    """`time=COL,value=COL[,unit=C|F][,zone=ID][,signal=S][,sensor=NAME]`."""
    pairs = {}
    for part in text.split(","):
        key, eq, value = part.partition("=")
        if not eq or not key.strip() or not value.strip():
            raise SeriesError("--map", text, "key=value pairs separated by commas: time=COL,value=COL[,unit=C|F]...")
        pairs[key.strip()] = value.strip()
    unknown = set(pairs) - {"time", "value", "unit", "zone", "signal", "sensor"}
    if unknown:
        raise SeriesError("--map", ", ".join(sorted(unknown)), "keys among time, value, unit, zone, signal, sensor")
    if "time" not in pairs or "value" not in pairs:
        raise SeriesError("--map", text, "at least time=COLUMN and value=COLUMN")
    if pairs.get("unit", "C").upper() not in ("C", "F"):
        raise SeriesError("--map unit", pairs["unit"], "C or F")
    return ColumnMap(
        time=pairs["time"],
        value=pairs["value"],
        unit=pairs.get("unit", "C").upper(),
        zone=pairs.get("zone"),
        signal=pairs.get("signal", "air_c"),
        sensor=pairs.get("sensor"),
    )


def _text(path: Path) -> str:
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise SeriesError(str(path), type(exc).__name__, f"a readable file ({exc.strerror})") from None
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        return raw.decode("cp1252", errors="replace")  # loggers' Windows exports ("°C" as 0xB0)


def read_export(path: str, cmap: ColumnMap, tz: str, time_format: str | None = None) -> Export:
    p = Path(path)
    lines = _text(p).splitlines()
    delimiter = _delimiter(lines[:200])
    table = list(csv.reader(lines, delimiter=delimiter))
    head_at = next(
        (
            i
            for i, row in enumerate(table)
            if cmap.time in [c.strip() for c in row] and cmap.value in [c.strip() for c in row]
        ),
        None,
    )
    if head_at is None:
        raise SeriesError(f"{p}: header", cmap.time + ", " + cmap.value, "a header line naming both mapped columns")
    header = [c.strip() for c in table[head_at]]
    ti, vi = header.index(cmap.time), header.index(cmap.value)
    body = [(head_at + 2 + k, row) for k, row in enumerate(table[head_at + 1 :]) if any(c.strip() for c in row)]
    if not body:
        raise SeriesError(str(p), "no data rows", "rows under the header")
    fmt = time_format or _find_format([row[ti].strip() for _, row in body if len(row) > ti], p)
    zone = ZoneInfo(tz)
    out = Export(time_format=fmt, delimiter=delimiter)
    for line, row in body:
        if len(row) <= max(ti, vi):
            out.refused.append(
                (line, f"{len(row)} columns, expected {cmap.time!r} and {cmap.value!r}", delimiter.join(row))
            )
            continue
        raw_t, raw_v = row[ti].strip(), row[vi].strip()
        try:
            stamp = datetime.strptime(raw_t, fmt)
        except ValueError:
            out.refused.append(
                (line, f"column {cmap.time}: {raw_t!r} is not a time in the form {fmt}", delimiter.join(row))
            )
            continue
        text = raw_v.replace("−", "-")
        if _DECIMAL_COMMA.match(text):
            text = text.replace(",", ".")
        try:
            value = float(text)
        except ValueError:
            out.refused.append((line, f"column {cmap.value}: {raw_v!r} is not a number", delimiter.join(row)))
            continue
        if not math.isfinite(value):
            out.refused.append((line, f"column {cmap.value}: {raw_v!r} is not a finite number", delimiter.join(row)))
            continue
        out.rows.append((line, stamp.replace(tzinfo=zone).timestamp(), value, delimiter.join(row)))
    return out


def _delimiter(lines: list[str]) -> str:
    """The candidate that splits most lines into the same number of cells (preamble lines
    differ; a tie goes to ';' then tab, as a decimal comma puts ',' in every data line)."""
    best = (0, 0, ",")
    for rank, d in enumerate((",", "\t", ";")):
        counts = Counter(line.count(d) for line in lines if d in line)
        if counts:
            cells, lines_with = counts.most_common(1)[0]
            best = max(best, (lines_with, rank, d))
    return best[2]


def _find_format(cells: list[str], path: Path) -> str:
    """The one time format that reads every row's time (a few bad cells are allowed: they are refused later)."""
    probe = [c for c in cells if c][:500]
    scores = []
    for fmt in TIME_FORMATS:
        ok = 0
        for c in probe:
            try:
                datetime.strptime(c, fmt)
                ok += 1
            except ValueError:
                pass
        scores.append((ok, fmt))
    best = max(s for s, _ in scores)
    if best < 0.9 * len(probe) or best == 0:
        raise SeriesError(
            f"{path}: time column",
            probe[0] if probe else "",
            "a time format watcher knows; give --time-format '%d.%m.%Y %H:%M'",
        )
    winners = [fmt for s, fmt in scores if s == best]
    if any(f.startswith("%d/") for f in winners) and any(f.startswith("%m/") for f in winners):
        raise SeriesError(
            f"{path}: time column",
            probe[0],
            "one reading of the dates: both day-first and month-first fit every row; give --time-format",
        )
    return winners[0]
