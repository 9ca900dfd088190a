"""Small CSV helpers shared by the series and trial readers: comments, columns, numbers."""

from __future__ import annotations

import csv
import math
from pathlib import Path

from watcher.errors import InputError


def read_rows(
    path: str | Path, required: tuple[str, ...], error: type[InputError]
) -> tuple[list[str], list[tuple[int, dict]]]:
    """Header and (line number, row) pairs; lines starting with '#' are comments."""
    header, rows = iter_rows(path, required, error)
    return header, list(rows)


def iter_rows(path: str | Path, required: tuple[str, ...], error: type[InputError]):
    """Like read_rows, but the rows are read as they are consumed (memory flat for any file
    size): header, then an iterator of (line number, row). The header is checked at once;
    an empty body is reported when the iterator ends without a row."""
    p = Path(path)
    try:
        fh = p.open(newline="", encoding="utf-8")
    except OSError as exc:
        raise error(str(p), type(exc).__name__, f"a readable UTF-8 CSV file ({exc})") from exc
    numbers: list[int] = []

    def lines():
        try:
            for i, line in enumerate(fh, start=1):
                if line.strip() and not line.lstrip().startswith("#"):
                    numbers.append(i)
                    yield line
        except (OSError, UnicodeDecodeError) as exc:
            raise error(str(p), type(exc).__name__, f"a readable UTF-8 CSV file ({exc})") from exc

    reader = csv.DictReader(lines())
    try:
        fieldnames = reader.fieldnames
    except BaseException:
        fh.close()
        raise
    if fieldnames is None:
        fh.close()
        raise error(str(p), "empty file", "a CSV header and rows")
    header = [h.strip() for h in fieldnames]
    reader.fieldnames = header
    missing = [c for c in required if c not in header]
    if missing:
        fh.close()
        raise error(f"{p}: header", header, "columns " + ", ".join(required))

    def rows():
        seen = False
        with fh:
            for row in reader:
                seen = True
                yield numbers[-1], row
                del numbers[:-1]  # keep only the current line's number
        if not seen:
            raise error(str(p), "no data rows", "at least one row under the header")

    return header, rows()


def number(raw, where: str, error: type[InputError], allow_empty: bool = False) -> float:
    """A finite float from a CSV cell; empty gives NaN when allowed."""
    text = (raw or "").strip()
    if not text:
        if allow_empty:
            return math.nan
        raise error(where, raw, "a number")
    try:
        value = float(text)
    except ValueError:
        raise error(where, raw, "a number") from None
    if not math.isfinite(value):
        raise error(where, raw, "a finite number (not NaN or infinity)")
    return value
