"""Produce a site's weekly summary: build, write the files, record it, queue it for channels
tagged `reports` (the HTML attached). Used by `watcher report` and by the service's schedule
(watcher.report.schedule decides when)."""

from __future__ import annotations

import logging
from pathlib import Path

from watcher.alerts.channels import route
from watcher.config import Config, Site
from watcher.report.build import build
from watcher.report.render import write
from watcher.report.week import Week
from watcher.store.db import Store

log = logging.getLogger("watcher.report")


def produce(
    store: Store, cfg: Config, site: Site, week: Week, now_ts: float, out_dir: str, formats, send: bool, auto: bool
) -> list[Path]:
    report = build(store, cfg, site, week, now_ts)
    paths = write(report, out_dir, formats)
    html_path = next((p for p in paths if p.suffix == ".html"), None)
    with store.atomic():
        files = {"paths": [str(p) for p in paths], "auto": auto}
        store.reports.add(site.id, week.label, now_ts, report.heads, report.digest, files)
        if send:
            store.outbox.add(
                f"Weekly texture summary {week.label}: {site.name or site.id}",
                report.summary
                + "\n\nThe full summary is attached (HTML; opens in any browser, prints on A4 or Letter).",
                ["reports", f"site:{site.id}"],
                now_ts,
                route(list(cfg.channels), ["reports", f"site:{site.id}"]),
                dedupe=f"report:{site.id}:{week.label}:{'auto' if auto else now_ts}",
                attach=str(html_path.resolve()) if html_path else None,
            )
    log.info("weekly summary %s for %s written: %s", week.label, site.id, ", ".join(str(p) for p in paths[:2]))
    return paths
