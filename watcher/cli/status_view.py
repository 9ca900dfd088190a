"""What `watcher status` prints: each zone's figures in a table; with --all-sites, one line a
site first (the fleet at a glance, from a central watcher's record), then each site's zones."""

from __future__ import annotations

import click

from watcher.alerts.metrics import temperature
from watcher.cli.common import fmt, site_tz, site_unit, stamp, table
from watcher.ranges import figure_text

ZONE_HEAD = [
    "zone",
    "air",
    "product",
    "mean um",
    "budget % (90 % range)",
    "days left (range)",
    "last reading",
    "figures of",
    "readings",
    "data",
]
SITE_HEAD = ["site", "zones", "open alerts", "most budget used %", "fewest days left", "stalest reading", "data"]


def age_text(age_s: float | None) -> str:
    if age_s is None:
        return "-"
    if age_s < 120:
        return f"{age_s:.0f} s ago"
    return f"{age_s / 60:.0f} min ago" if age_s < 7200 else f"{age_s / 3600:.1f} h ago"


def zone_table(zones: list[dict], now_ts: float, cfg) -> str:
    lines = []
    for z in zones:
        age = z["last_reading_age_s"]
        data = "no data" if age is None else "gap open" if z["open_gap"] else "ok"
        days_none = "never" if z["state"] == "frozen" else "-"  # 'never': no coarsening below Tg'; '-': no figures yet
        lines.append(
            [
                z["id"],
                temperature(z["air_c"], site_unit(cfg, z["id"]), "-"),
                temperature(z["product_c"], site_unit(cfg, z["id"]), "-"),
                fmt(z["mean_diameter_um"], ".1f"),
                figure_text(z, "budget_used_pct", ".1f"),
                figure_text(z, "days_to_limit", ".0f", days_none),
                age_text(age),
                age_text(None if z["model_time_ts"] is None else max(0.0, now_ts - z["model_time_ts"])),
                str(z["readings_total"]),
                data,
            ]
        )
    return table(lines, ZONE_HEAD, ["left"] + ["right"] * 8 + ["left"])


def site_table(sites: list[dict]) -> str:
    lines = []
    for s in sites:
        lines.append(
            [
                s["id"],
                str(s["zones"]),
                str(s["open_alerts"]),
                fmt(s["most_budget_used_pct"], ".1f"),
                fmt(s["fewest_days_left"], ".0f"),
                age_text(s["stalest_reading_age_s"]),
                _site_data(s),
            ]
        )
    return table(lines, SITE_HEAD, ["left"] + ["right"] * 5 + ["left"])


def _site_data(s: dict) -> str:
    parts = [f"{s['zones_without_data']} no data"] if s["zones_without_data"] else []
    parts += [f"{s['zones_with_gap_open']} gap open"] if s["zones_with_gap_open"] else []
    return ", ".join(parts) or "ok"


def show(report: dict, cfg, all_sites: bool) -> None:
    click.echo(f"Database {report['database']} (read-only), as of {stamp(report['now_ts'], site_tz(cfg))}")
    if all_sites:
        click.echo(f"Sites ({len(report['sites'])}):")
        click.echo(site_table(report["sites"]))
        for s in report["sites"]:
            zones = [z for z in report["zones"] if z["site"] == s["id"]]
            click.echo(f"\n{s['name'] or s['id']} ({s['id']}), site time {stamp(report['now_ts'], s['timezone'])}")
            click.echo(zone_table(zones, report["now_ts"], cfg))
        click.echo("")
    else:
        click.echo(zone_table(report["zones"], report["now_ts"], cfg))
    click.echo(
        "Days left: if the product stayed at its current temperature. Ranges: 90 % range from the profile's "
        "uncertainty; alerts on days left use the cautious (lower) end. Figures of: how old the data time is that "
        "the figures describe (they reach the last reading once it has waited out the reorder window)."
    )
    click.echo(f"Rejected messages stored: {report['rejections_total']}; data gaps recorded: {report['gaps_total']}.")
    alerts = report["open_alerts"]
    if alerts:
        click.echo(f"Open alerts ({len(alerts)}; `watcher alerts --open` for more):")
        for a in alerts[:10]:
            ack = f", acknowledged by {a['acked_by']}" if a["acked_by"] else ""
            click.echo(f"  {a['id']:>5} {a['severity']:<8} {a['zone']:<12} {a['label']}{ack}")
    else:
        click.echo("No open alerts.")
