"""A data logger's CSV export, read as it is: its delimiter (comma, semicolon or tab), decimal
commas, lines of preamble above the header, its own time format (found from the rows, or
given), local times in the site's time zone, a UTF-8 or Windows-1252 file. Each row becomes a
(line, time, value) or a refusal naming the line, the column, the value and what was expected.

The file is read as a stream, never whole (memory flat for any export): one pass finds its
encoding, one its header and time format from the first rows, and the rows are read as they
are consumed.
"""

from __future__ import annotations

import codecs
import csv
import itertools
import math
import re
from collections import Counter
from collections.abc import Iterator
from dataclasses import dataclass
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
    path: Path
    encoding: str
    delimiter: str
    head_at: int  # the header's index among the file's lines
    columns: tuple[int, int]  # the time and value columns' indexes
    names: tuple[str, str]  # their names
    time_format: str
    tz: str

    def records(self) -> Iterator[tuple[int, float | None, float | None, str, str | None]]:
        """(line, epoch s, value, the row as written, None) for each row read, or (line, None,
        None, the row, why) for one refused; as the file is read."""
        (ti, vi), (tname, vname) = self.columns, self.names
        zone = ZoneInfo(self.tz)
        d = self.delimiter
        table = csv.reader(_lines(self.path, self.encoding), delimiter=d)
        for k, row in enumerate(itertools.islice(table, self.head_at + 1, None)):
            if not any(c.strip() for c in row):
                continue
            line = self.head_at + 2 + k
            if len(row) <= max(ti, vi):
                yield line, None, None, d.join(row), f"{len(row)} columns, expected {tname!r} and {vname!r}"
                continue
            raw_t, raw_v = row[ti].strip(), row[vi].strip()
            try:
                stamp = datetime.strptime(raw_t, self.time_format)
            except ValueError:
                yield (
                    line,
                    None,
                    None,
                    d.join(row),
                    f"column {tname}: {raw_t!r} is not a time in the form {self.time_format}",
                )
                continue
            text = raw_v.replace("−", "-")
            if _DECIMAL_COMMA.match(text):
                text = text.replace(",", ".")
            try:
                value = float(text)
            except ValueError:
                yield line, None, None, d.join(row), f"column {vname}: {raw_v!r} is not a number"
                continue
            if not math.isfinite(value):
                yield line, None, None, d.join(row), f"column {vname}: {raw_v!r} is not a finite number"
                continue
            yield line, stamp.replace(tzinfo=zone).timestamp(), value, d.join(row), None


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


def _encoding(path: Path) -> str:
    """UTF-8 (with or without its mark) when every byte decodes as that, else Windows-1252
    (loggers' Windows exports, "°C" as 0xB0); checked in chunks, never the file whole."""
    decoder = codecs.getincrementaldecoder("utf-8")()
    try:
        with path.open("rb") as fh:
            while chunk := fh.read(1 << 20):
                decoder.decode(chunk)
            decoder.decode(b"", final=True)
    except UnicodeDecodeError:
        return "cp1252"
    except OSError as exc:
        raise SeriesError(str(path), type(exc).__name__, f"a readable file ({exc.strerror})") from None
    return "utf-8-sig"


def _lines(path: Path, encoding: str) -> Iterator[str]:
    """The file's lines without their ends, as they are read."""
    with path.open(encoding=encoding, errors="replace", newline=None) as fh:
        for line in fh:
            yield line.rstrip("\n")


def read_export(path: str, cmap: ColumnMap, tz: str, time_format: str | None = None) -> Export:
    """The export's layout (delimiter, header, time format) from its first lines and rows; its
    rows come from Export.records() as the file is read."""
    p = Path(path)
    encoding = _encoding(p)
    delimiter = _delimiter(list(itertools.islice(_lines(p, encoding), 200)))
    table = csv.reader(_lines(p, encoding), delimiter=delimiter)
    head_at, header = None, []
    for i, row in enumerate(table):
        cells = [c.strip() for c in row]
        if cmap.time in cells and cmap.value in cells:
            head_at, header = i, cells
            break
    if head_at is None:
        raise SeriesError(f"{p}: header", cmap.time + ", " + cmap.value, "a header line naming both mapped columns")
    ti, vi = header.index(cmap.time), header.index(cmap.value)
    probe = [row for row in itertools.islice((r for r in table if any(c.strip() for c in r)), 500)]
    if not probe:
        raise SeriesError(str(p), "no data rows", "rows under the header")
    fmt = time_format or _find_format([row[ti].strip() for row in probe if len(row) > ti], p)
    return Export(p, encoding, delimiter, head_at, (ti, vi), (cmap.time, cmap.value), fmt, tz)


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
