"""`watcher status`: each zone's latest figures, read from the database without writing."""

from __future__ import annotations

import time

from watcher.config import default_db_path, load_config
from watcher.ranges import RANGE_KEYS
from watcher.store.db import Store

DEFAULT_MAX_GAP_S = 900.0


def read_status(config_path: str | None, db_path: str | None, now: float | None = None) -> dict:
    now = time.time() if now is None else now
    cfg = load_config(config_path) if config_path else None
    path = db_path or (cfg.storage.path if cfg else default_db_path())
    max_gap = cfg.ingest.max_gap_s if cfg else DEFAULT_MAX_GAP_S
    store = Store(path, readonly=True)
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
            "database": path,
            "now_ts": now,
            "sites": site_lines(cfg, zones, alerts),
            "zones": zones,
            "rejections_total": store.rejections.since(-float("inf")),
            "open_alerts": alerts,
            "gaps_total": store.record.count("gaps"),
        }
    finally:
        store.close()


def site_lines(cfg, zones: list[dict], alerts: list[dict]) -> list[dict]:
    """One summary a site, in the configuration's order: its zones, open alerts, the most
    budget used and fewest days left among its zones, its stalest zone's last reading."""
    sites = [(s.id, s.name, s.timezone) for s in cfg.sites] if cfg else [("site", "", "UTC")]
    out = []
    for site_id, name, tz in sites:
        mine = [z for z in zones if z["site"] == site_id]
        ids = {z["id"] for z in mine}
        ages = [z["last_reading_age_s"] for z in mine if z["last_reading_age_s"] is not None]
        out.append(
            {
                "id": site_id,
                "name": name,
                "timezone": tz,
                "zones": len(mine),
                "open_alerts": sum(1 for a in alerts if a["zone"] in ids),
                "most_budget_used_pct": max(
                    (z["budget_used_pct"] for z in mine if z["budget_used_pct"] is not None), default=None
                ),
                "fewest_days_left": min(
                    (z["days_to_limit"] for z in mine if z["days_to_limit"] is not None), default=None
                ),
                "stalest_reading_age_s": max(ages, default=None),
                "zones_without_data": len(mine) - len(ages),
                "zones_with_gap_open": sum(1 for z in mine if z["open_gap"] and z["last_reading_age_s"] is not None),
            }
        )
    return out
