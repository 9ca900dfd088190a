"""ISO weeks in a site's time zone."""

from __future__ import annotations

import datetime as dt
import re
from dataclasses import dataclass
from zoneinfo import ZoneInfo

from watcher.errors import InputError


@dataclass(frozen=True)
class Week:
    label: str  # "2026-W48"
    tz: str
    start_ts: float  # Monday 00:00 local
    end_ts: float  # the next Monday 00:00 local (a DST week is 167 or 169 hours long)

    def days(self) -> list[tuple[str, float, float]]:
        zone = ZoneInfo(self.tz)
        first = dt.datetime.fromtimestamp(self.start_ts, zone).date()
        out = []
        for i in range(7):
            d = first + dt.timedelta(days=i)
            s = dt.datetime.combine(d, dt.time(), zone).timestamp()
            e = dt.datetime.combine(d + dt.timedelta(days=1), dt.time(), zone).timestamp()
            out.append((d.isoformat(), s, e))
        return out


def week_of(label: str, tz: str) -> Week:
    m = re.fullmatch(r"(\d{4})-W(\d{2})", label.strip())
    if not m:
        raise InputError("--week", label, "an ISO week such as 2026-W48")
    year, num = int(m.group(1)), int(m.group(2))
    try:
        monday = dt.date.fromisocalendar(year, num, 1)
    except ValueError:
        raise InputError("--week", label, f"a week that exists in {year}") from None
    zone = ZoneInfo(tz)
    start = dt.datetime.combine(monday, dt.time(), zone).timestamp()
    end = dt.datetime.combine(monday + dt.timedelta(days=7), dt.time(), zone).timestamp()
    return Week(f"{year}-W{num:02d}", tz, start, end)


def week_containing(time_ts: float, tz: str) -> Week:
    y, w, _ = dt.datetime.fromtimestamp(time_ts, ZoneInfo(tz)).isocalendar()
    return week_of(f"{y}-W{w:02d}", tz)


def last_complete_week(now_ts: float, tz: str) -> Week:
    return week_containing(week_containing(now_ts, tz).start_ts - 1.0, tz)
