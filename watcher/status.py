"""`watcher status`: each zone's latest figures, read from the database without writing."""

from __future__ import annotations

import time

from watcher.config import load_config, open_record
from watcher.ranges import RANGE_KEYS
from watcher.report.sites import site_lines

DEFAULT_MAX_GAP_S = 900.0


def read_status(config_path: str | None, db_path: str | None, now: float | None = None) -> dict:
    now = time.time() if now is None else now
    cfg = load_config(config_path) if config_path else None
    max_gap = cfg.ingest.max_gap_s if cfg else DEFAULT_MAX_GAP_S
    store = open_record(config_path, db_path, readonly=True)
    try:
        rows = store.zones.rows()
        zone_ids = [z.id for z in cfg.zones] if cfg else sorted(rows)
        zones = []
        for zid in zone_ids:
            row = rows.get(zid)
            total, last_ts = store.readings.summary(zid)
            fig = row.figures if row else {}
            age = None if last_ts is None else max(0.0, now - last_ts)
            zones.append(
                {
                    "id": zid,
                    "site": cfg.site_of(zid).id if cfg else "site",
                    "air_c": row.last_air_c if row else None,
                    "product_c": row.last_product_c if row and row.last_product_c is not None else fig.get("product_c"),
                    "mean_diameter_um": fig.get("mean_diameter_um"),
                    "budget_used_pct": fig.get("budget_used_pct"),
                    "days_to_limit": fig.get("days_to_limit"),
                    **{k: fig.get(k) for k in RANGE_KEYS},
                    "excess_growth_um": fig.get("excess_growth_um"),
                    "state": fig.get("state", "waiting"),
                    "worst_position": fig.get("worst_position"),
                    "positions": fig.get("positions", {}),
                    "model_time_ts": fig.get("model_time_ts"),
                    "last_reading_age_s": age,
                    "readings_total": total,
                    "open_gap": age is None or age > max_gap,
                    "gaps": [{"start_ts": g[1], "end_ts": g[2], "seconds": g[3]} for g in store.gaps.list(zid)[-5:]],
                    "figures_updated_ts": row.updated_ts if row else None,
                }
            )
        alerts = [
            {k: a[k] for k in ("id", "zone", "severity", "status", "label", "raised_ts", "acked_by")}
            for a in store.alerts.list(open_only=True)
        ]
        return {
            "database": store.where,
            "now_ts": now,
            "sites": site_lines(cfg, zones, alerts),
            "zones": zones,
            "rejections_total": store.rejections.since(-float("inf")),
            "open_alerts": alerts,
            "gaps_total": store.record.count("gaps"),
        }
    finally:
        store.close()
