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
    p = Path(path)
    try:
        with p.open(newline="", encoding="utf-8") as fh:
            numbered = [
                (i, line) for i, line in enumerate(fh, start=1) if line.strip() and not line.lstrip().startswith("#")
            ]
    except (OSError, UnicodeDecodeError) as exc:
        raise error(str(p), type(exc).__name__, f"a readable UTF-8 CSV file ({exc})") from exc
    if not numbered:
        raise error(str(p), "empty file", "a CSV header and rows")
    reader = csv.DictReader(line for _, line in numbered)
    header = [h.strip() for h in (reader.fieldnames or [])]
    reader.fieldnames = header
    missing = [c for c in required if c not in header]
    if missing:
        raise error(f"{p}: header", header, "columns " + ", ".join(required))
    rows = [(numbered[i + 1][0], row) for i, row in enumerate(reader)]
    if not rows:
        raise error(str(p), "no data rows", "at least one row under the header")
    return header, rows


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
