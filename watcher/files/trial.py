"""Storage-trial CSV: columns `days`, `temp_c`, `mean_diameter_um`; a day-0 row is the
initial size; rows at one temperature form a constant-temperature group. A comment line
`# scale: NAME` names the measurement method the sizes come from (light-microscopy,
sem-freeze-dried, ...): sizes from different methods are not comparable."""

from __future__ import annotations

import re
from pathlib import Path

from watcher.errors import TrialError
from watcher.files.csvtable import number, read_rows
from watcher.model.calibrate import Trial, make_trial


def read_trial(path: str) -> Trial:
    _, rows = read_rows(path, ("days", "temp_c", "mean_diameter_um"), TrialError)
    days, temps, sizes = [], [], []
    for line, row in rows:
        where = f"{path}: line {line}"
        d = number(row.get("days"), f"{where}, column days", TrialError)
        if d < 0:
            raise TrialError(f"{where}, column days", d, "a storage time of 0 or more days")
        s = number(row.get("mean_diameter_um"), f"{where}, column mean_diameter_um", TrialError)
        if s <= 0:
            raise TrialError(f"{where}, column mean_diameter_um", s, "a positive mean diameter in um")
        days.append(d)
        temps.append(number(row.get("temp_c"), f"{where}, column temp_c", TrialError))
        sizes.append(s)
    return make_trial(days, temps, sizes, scale=_declared_scale(path), name=Path(path).name)


def _declared_scale(path: str) -> str | None:
    """The `# scale: NAME` comment, if the file has one (read_rows has already read it)."""
    for line in Path(path).read_text(encoding="utf-8").splitlines():
        m = re.match(r"\s*#\s*scale\s*[:=]\s*(\S+)", line)
        if m:
            return m.group(1)
    return None
