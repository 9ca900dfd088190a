"""One summary a site from its zones' figures: the fleet at a glance, for `watcher status
--all-sites` and the site page of a watcher with several sites. No pandas."""

from __future__ import annotations


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
