"""When each site's weekly summary is due. Light: no pandas, so the service can ask every
minute without loading the reporting stack."""

from __future__ import annotations

import datetime as dt
from zoneinfo import ZoneInfo

from watcher.config import Config, Site
from watcher.report.week import Week, last_complete_week
from watcher.store.db import Store


def due_weeks(store: Store, cfg: Config, now_ts: float) -> list[tuple[Site, Week]]:
    """(site, week) pairs whose scheduled summary is due and not yet produced by the schedule."""
    if not cfg.reports.enabled:
        return []
    out = []
    for site in cfg.sites or (Site("site", "", "UTC"),):
        week = last_complete_week(now_ts, site.timezone)
        end_local = dt.datetime.fromtimestamp(week.end_ts, ZoneInfo(site.timezone))
        due_day = end_local.date() + dt.timedelta(days=cfg.reports.weekday)
        due = dt.datetime.combine(due_day, dt.time(cfg.reports.at_minutes // 60, cfg.reports.at_minutes % 60))
        if now_ts < due.replace(tzinfo=ZoneInfo(site.timezone)).timestamp():
            continue
        if not store.reports.scheduled(site.id, week.label):
            out.append((site, week))
    return out
