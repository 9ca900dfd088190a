"""The site page: what the site looks like now, for people without a terminal. Served by the
service at `/` on its HTTP port (loopback by default).

Plain server-rendered HTML with inline SVG charts (the weekly summary's, charts.py), no
script, refreshing itself every minute: every zone now (temperatures, crystal size, budget
used and days left with their ranges, data age), open alerts, the lots with least texture life
left, and per zone the last 24 h and 7 days (temperatures with events shaded, crystal size
against the limit). Read-only: it opens the database read-only for each rendering, and keeps a
rendering for a minute so that many viewers cost one.
"""

from __future__ import annotations

import html
import threading
import time

import pandas as pd

from watcher.alerts.messages import local as local_time
from watcher.alerts.metrics import duration, temperature
from watcher.caution import CAUTION
from watcher.config import Config
from watcher.lots.rank import at_risk, rank_key
from watcher.ranges import figure_text
from watcher.report.charts import zone_chart
from watcher.report.data import zone_model
from watcher.report.sites import site_lines
from watcher.store.db import Store

REFRESH_S = 60
WINDOWS = (("last 24 h", 86400.0), ("last 7 days", 7 * 86400.0))
MAX_LOTS = 10

STYLE = """
body{font:14px/1.45 system-ui,sans-serif;margin:0 auto;max-width:1100px;padding:12px 18px;color:#1d2529}
h1{font-size:20px;margin:6px 0 2px}h2{font-size:16px;margin:22px 0 6px;border-bottom:1px solid #d5dade}
h3{font-size:14px;margin:14px 0 4px}.sub{color:#5b666d;margin:0 0 10px}
table{border-collapse:collapse;width:100%}th,td{padding:4px 8px;border-bottom:1px solid #e6e9eb;text-align:left}
td.n{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}th{font-weight:600;background:#f3f5f6}
.stale{color:#a4471b;font-weight:600}.critical{color:#a0181b;font-weight:600}.warning{color:#8a5a00;font-weight:600}
.charts{display:flex;flex-wrap:wrap;gap:8px}.charts figure{margin:0;flex:1 1 480px}.charts svg{width:100%;height:auto}
.caution{margin-top:24px;color:#5b666d;font-size:12px}
"""


class SitePage:
    """The rendered page, kept for a minute (one rendering at a time)."""

    def __init__(self, config: Config, ttl_s: float = REFRESH_S):
        self.config, self.ttl_s = config, ttl_s
        self._lock = threading.Lock()
        self._cached: tuple[float, bytes] | None = None

    def html(self, now_ts: float | None = None) -> bytes:
        with self._lock:
            mono = time.monotonic()
            if self._cached is None or mono - self._cached[0] >= self.ttl_s:
                self._cached = (mono, render(self.config, time.time() if now_ts is None else now_ts).encode())
            return self._cached[1]


def render(cfg: Config, now_ts: float) -> str:
    store = Store.configured(cfg.storage, readonly=True)
    try:
        return _page(cfg, store, now_ts)
    finally:
        store.close()


def _e(x) -> str:
    return html.escape(str(x))


def _page(cfg: Config, store: Store, now_ts: float) -> str:
    site = cfg.sites[0] if len(cfg.sites) == 1 else None
    tz = site.timezone if site else "UTC"
    title = (site.name or site.id) if site else f"{len(cfg.sites)} sites"
    rows = store.zones.rows()
    zone_table, zones = _zones(cfg, store, rows, now_ts)
    parts = [
        "<!doctype html><html lang='en'><head><meta charset='utf-8'>",
        f"<meta http-equiv='refresh' content='{REFRESH_S}'>",
        "<meta name='viewport' content='width=device-width, initial-scale=1'>",
        f"<title>{_e(title)}: site now</title><style>{STYLE}</style></head><body>",
        f"<h1>{_e(title)}: the site now</h1>",
        f"<p class='sub'>As of {_e(local_time(now_ts, tz))} ({_e(tz)}); this page refreshes every minute. "
        "Product temperatures and texture figures are model estimates.</p>",
        "" if site else _sites(cfg, store, zones),
        zone_table,
        _alerts(cfg, store),
        _lots(cfg, store),
    ]
    for z in cfg.zones:
        parts.append(f"<h2 id='zone-{_e(z.id)}'>{_e(z.name)}</h2><div class='charts'>")
        for label, span_s in WINDOWS:
            parts.append(f"<figure>{_chart(store, z, cfg.site_of(z.id).timezone, now_ts, span_s, label)}</figure>")
        parts.append("</div>")
    parts.append(f"<p class='caution'>{_e(CAUTION)}</p></body></html>")
    return "".join(parts)


def _sites(cfg: Config, store: Store, zones: list[dict]) -> str:
    """A line a site (a watcher of several sites): zones, open alerts, the most budget used,
    the fewest days left and the stalest reading among its zones."""
    out = [
        "<h2>Sites</h2><table><tr><th>site</th><th>zones</th><th>open alerts</th><th>most budget used</th>"
        "<th>fewest days left</th><th>stalest reading</th></tr>"
    ]
    for s in site_lines(cfg, zones, store.alerts.list(open_only=True)):
        age = s["stalest_reading_age_s"]
        budget, days = s["most_budget_used_pct"], s["fewest_days_left"]
        out.append(
            f"<tr><td>{_e(s['name'] or s['id'])}</td><td class='n'>{s['zones']}</td><td class='n'>{s['open_alerts']}</td>"
            f"<td class='n'>{'-' if budget is None else f'{budget:.1f} %'}</td>"
            f"<td class='n'>{'-' if days is None else f'{days:.0f}'}</td>"
            f"<td>{'no data' if age is None else _e(duration(age)) + ' ago'}</td></tr>"
        )
    out.append("</table>")
    return "".join(out)


def _zones(cfg: Config, store: Store, rows: dict, now_ts: float) -> tuple[str, list[dict]]:
    """The zones table, and each zone's figures as `site_lines` reads them."""
    several = len(cfg.sites) > 1
    out = [
        "<h2>Zones</h2><table><tr>"
        + ("<th>site</th>" if several else "")
        + "<th>zone</th><th>product profile</th><th>air</th><th>product (est.)</th><th>mean crystal</th>"
        "<th>budget used (90 % range)</th><th>days left (range)</th><th>newest reading</th></tr>"
    ]
    zones = []
    for z in cfg.zones:
        row = rows.get(z.id)
        fig = row.figures if row else {}
        unit = cfg.site_of(z.id).temp_unit
        _, last_ts = store.readings.summary(z.id)
        age = None if last_ts is None else max(0.0, now_ts - last_ts)
        stale = age is None or age > cfg.ingest.max_gap_s
        product = row.last_product_c if row and row.last_product_c is not None else fig.get("product_c")
        mean = fig.get("mean_diameter_um")
        zones.append(
            {
                "id": z.id,
                "site": z.site,
                "last_reading_age_s": age,
                "open_gap": stale,
                "budget_used_pct": fig.get("budget_used_pct"),
                "days_to_limit": fig.get("days_to_limit"),
            }
        )
        out.append(
            "<tr>"
            + (f"<td>{_e(cfg.site_of(z.id).name or z.site)}</td>" if several else "")
            + f"<td>{_e(z.name)}</td><td>{_e(z.profile.name)}</td>"
            f"<td class='n'>{_e(temperature(row.last_air_c if row else None, unit, '-'))}</td>"
            f"<td class='n'>{_e(temperature(product, unit, '-'))}</td>"
            f"<td class='n'>{'-' if mean is None else f'{mean:.1f} um'}</td>"
            f"<td class='n'>{_e(figure_text(fig, 'budget_used_pct', '.1f'))} %</td>"
            f"<td class='n'>{_e(figure_text(fig, 'days_to_limit', '.0f'))}</td>"
            f"<td{' class=stale' if stale else ''}>{'no data' if age is None else _e(duration(age)) + ' ago'}</td></tr>"
        )
    out.append("</table>")
    return "".join(out), zones


def _alerts(cfg: Config, store: Store) -> str:
    alerts = store.alerts.list(open_only=True)
    if not alerts:
        return "<h2>Open alerts</h2><p>None.</p>"
    out = ["<h2>Open alerts</h2><table><tr><th>id</th><th>severity</th><th>where</th><th>what</th><th>since</th></tr>"]
    for a in alerts:
        tz = cfg.site_of(a["zone"]).timezone if cfg.zone(a["zone"]) else "UTC"
        zone = cfg.zone(a["zone"])
        where = zone.name if zone else a["zone"]
        ack = f" (acknowledged by {a['acked_by']})" if a.get("acked_by") else ""
        since = a.get("since_ts") or a["raised_ts"]
        out.append(
            f"<tr><td class='n'>{a['id']}</td><td class='{_e(a['severity'])}'>{_e(a['severity'])}</td>"
            f"<td>{_e(where)}</td><td>{_e(a['label'])}{_e(ack)}</td><td>{_e(local_time(since, tz))}</td></tr>"
        )
    out.append("</table>")
    return "".join(out)


def _lots(cfg: Config, store: Store) -> str:
    lots = sorted((r for r in store.lots.overview() if r["present"]), key=rank_key)[:MAX_LOTS]
    if not lots:
        return "<h2>Lots with least texture life left</h2><p>No lots in store.</p>"
    out = [
        "<h2>Lots with least texture life left</h2><table><tr><th>lot</th><th>product</th><th>zone</th>"
        "<th>budget used</th><th>days left (range)</th><th></th></tr>"
    ]
    for r in lots:
        f = r["figures"] or {}
        zone = cfg.zone(r["zone"]) if r["zone"] else None
        risk = "<span class='warning'>at risk</span>" if at_risk(f) else ""
        out.append(
            f"<tr><td>{_e(r['lot'])}</td><td>{_e(r['product'])}</td><td>{_e(zone.name if zone else r['zone'])}</td>"
            f"<td class='n'>{_e(figure_text(f, 'budget_used_pct', '.1f'))} %</td>"
            f"<td class='n'>{_e(figure_text(f, 'days_to_limit', '.0f'))}</td><td>{risk}</td></tr>"
        )
    out.append("</table>")
    return "".join(out)


def _chart(store: Store, zone, tz: str, now_ts: float, span_s: float, label: str) -> str:
    start = now_ts - span_s
    model = zone_model(store, zone, start, now_ts, period=label)
    events = pd.DataFrame(store.events.of_zone(zone.id, start, now_ts), columns=["kind", "start_ts", "end_ts"])
    if model is None:
        return f"<p>{_e(zone.name)}, {label}: no model state saved yet.</p>"
    return zone_chart(model, events, zone.setpoint_c, tz, start, now_ts, f"{zone.name}, {label}")
