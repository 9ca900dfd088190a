"""One site-week summary: tables (pandas), charts (SVG) and a plain-language paragraph."""

from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass, field
from zoneinfo import ZoneInfo

import pandas as pd

from watcher import MODEL_VERSION, __version__
from watcher.alerts.messages import CAUTION
from watcher.config import Config, Site
from watcher.errors import InputError
from watcher.ranges import RANGE_KEYS, cautious_days
from watcher.report import charts
from watcher.report.data import SiteWeek, load
from watcher.report.figures import (
    alert_table,
    completeness,
    defrost_figures,
    door_figures,
    event_list,
    growth_table,
    rejection_table,
    temperature_table,
)
from watcher.report.lots import lots_note, lots_table
from watcher.report.week import Week
from watcher.store import chain
from watcher.store.db import Store


@dataclass
class ZoneSection:
    zone: str
    name: str
    setpoint_c: float
    profile: str
    model_note: str
    budget: dict
    temperatures: pd.DataFrame
    doors: dict
    doors_by_hour: pd.DataFrame
    defrosts: dict
    excursions: pd.DataFrame
    growth: pd.DataFrame
    charts: dict[str, str] = field(default_factory=dict)


@dataclass
class Section:
    """One of the summary's site-wide tables: its rows are made once, in build(), and the HTML,
    CSV and JSON renderers all read them from here. Adding a table is adding a Section."""

    key: str  # CSV file stem and JSON key
    title: str  # HTML heading
    frame: pd.DataFrame
    empty: str = ""  # HTML text when there are no rows ("": the table is left out)
    note: str = ""  # shown above the table (and kept in JSON when rows_key is set)
    level: int = 2  # 3: a part of the section before it
    rows_key: str | None = None  # JSON: {"note": ..., rows_key: rows} instead of the rows alone


@dataclass
class Report:
    site: Site
    week: Week
    generated_ts: float
    summary: str
    zones: list[ZoneSection]
    sections: list[Section]
    upto_ts: float  # the figures cover [week start, upto_ts): the week's end, or now for a week in progress
    heads: dict
    digest: str
    versions: dict
    cautions: list[str]

    @property
    def in_progress(self) -> bool:
        return self.upto_ts < self.week.end_ts

    def section(self, key: str) -> Section:
        return next(x for x in self.sections if x.key == key)

    @property
    def alerts(self) -> pd.DataFrame:
        return self.section("alerts").frame

    @property
    def lots(self) -> pd.DataFrame:
        return self.section("lots").frame

    @property
    def lots_note(self) -> str:
        return self.section("lots").note

    def tables(self) -> dict[str, pd.DataFrame]:
        """Every table, by file name stem (the CSV files)."""
        out = {x.key: x.frame for x in self.sections}
        for z in self.zones:
            out[f"{z.zone}-temperatures"] = z.temperatures
            out[f"{z.zone}-growth"] = z.growth
            out[f"{z.zone}-excursions"] = z.excursions
            out[f"{z.zone}-doors-by-hour"] = z.doors_by_hour
        return out


def _num(v, fmt=".1f", none="n/a") -> str:
    return none if v is None or (isinstance(v, float) and math.isnan(v)) else format(v, fmt)


def local_text(time_ts: float, tz: str) -> str:
    """An instant in the site's time zone, as people read it: "Wed 02 Dec 2026 15:40 GMT"."""
    return dt.datetime.fromtimestamp(time_ts, ZoneInfo(tz)).strftime("%a %d %b %Y %H:%M %Z")


def summary_text(
    site: Site, week: Week, zones: list[ZoneSection], alerts: pd.DataFrame, comp: pd.DataFrame, gaps, upto_ts: float
) -> str:
    """One paragraph: what happened this week and what to look at."""
    in_progress = upto_ts < week.end_ts
    progress = f" (in progress, up to {local_text(upto_ts, week.tz)})" if in_progress else ""
    parts = [f"Week {week.label} at {site.name or site.id}{progress}:"]
    used = [(z.name, z.budget["used_in_week_pct"]) for z in zones if z.budget["used_in_week_pct"] is not None]
    if used:
        lo, hi = min(u for _, u in used), max(u for _, u in used)
        worst = max(used, key=lambda x: x[1])[0]
        parts.append(f"the zones used {lo:.1f} to {hi:.1f} % of their texture budget this week (most: {worst}).")
    causes = []
    for z in zones:
        week_row = z.growth[z.growth["day"] == "week"]
        if len(week_row):
            r = week_row.iloc[0]
            top = max(("defrost_um", "door_um", "excursion_um"), key=lambda c: r[c])
            if r[top] > 0:
                causes.append((r[top], z.name, top.split("_")[0]))
    if causes:
        amount, name, cause = max(causes)
        parts.append(f"The largest extra growth came from {cause}s in {name} ({amount:.2f} um).")
    n_exc = sum(len(z.excursions) for z in zones)
    if n_exc:
        parts.append(
            f"{n_exc} excursion{'s' if n_exc != 1 else ''} (warm periods explained by no door or defrost) occurred."
        )
    if len(alerts):
        acked = alerts["minutes_to_ack"].dropna()
        still = int(alerts["open_at_week_end"].sum())
        parts.append(
            (f"{len(alerts)} alerts were active" if len(alerts) != 1 else "1 alert was active")
            + f"; {len(acked)} acknowledged"
            + (f" (median {acked.median():.0f} min)" if len(acked) else "")
            + f", {still} still open {'now' if in_progress else 'at the end of the week'}."
        )
    else:
        parts.append("No alerts were active.")
    if len(comp) and comp["complete_pct"].notna().any():
        parts.append(f"Data: {comp['complete_pct'].min():.1f} % of expected readings from the least complete sensor")
        parts[-1] += f"; {len(gaps)} gap{'s' if len(gaps) != 1 else ''} recorded." if len(gaps) else "; no gaps."
    else:
        parts.append("Data: no readings this week.")
    look = [z.name for z in zones if (z.budget["end_pct"] or 0) >= 80 or (cautious_days(z.budget) or 1e9) < 30]
    if look:
        parts.append("Look at: " + ", ".join(look) + " (high budget used or under 30 days to the limit).")
    return " ".join(parts)


def zone_section(store: Store, sw: SiteWeek, zone, end_ts: float) -> ZoneSection:
    """end_ts: where this zone's held values and open events stop counting: the week's end, or
    earlier when the week is in progress or the zone's data stop (never past the last reading)."""
    m = sw.models.get(zone.id)
    ev = sw.events[sw.events["zone"] == zone.id]
    tz, week = sw.site.timezone, sw.week
    doors, by_hour = door_figures(ev, tz, end_ts)
    start = m.budget_start_pct if m else None
    end = m.budget_end_pct if m else None
    budget = {
        "start_pct": start,
        "end_pct": end,
        "used_in_week_pct": None if start is None or end is None else end - start,
        "days_to_limit": m.days_to_limit_end if m else None,
        **{k: (m.ranges_end.get(k) if m else None) for k in RANGE_KEYS},
        "additive_rule_end_pct": m.additive_rule_end_pct if m else None,
        "mean_start_um": m.mean_start_um if m else None,
        "mean_end_um": m.mean_end_um if m else None,
        "limit_um": zone.profile.limit_mean_diameter_um,
        "position": m.position if m else None,
    }
    temps = temperature_table(m, zone.setpoint_c, end_ts) if m else pd.DataFrame()
    growth = growth_table(sw.daily, zone.id)
    sec = ZoneSection(
        zone=zone.id,
        name=zone.name,
        setpoint_c=zone.setpoint_c,
        profile=zone.profile.name,
        model_note=m.start_note if m else "no model state for this zone in or before this week",
        budget=budget,
        temperatures=temps,
        doors=doors,
        doors_by_hour=by_hour,
        defrosts=defrost_figures(ev, lambda a, b: _week_peak(store, zone.id, week, a, b), end_ts),
        excursions=event_list(ev, "excursion", tz),
        growth=growth,
    )
    sec.charts["trace"] = charts.zone_chart(
        m, ev, zone.setpoint_c, tz, week.start_ts, week.end_ts, f"{zone.name}: temperatures and crystal size"
    )
    if len(growth):
        sec.charts["growth"] = charts.growth_bars(growth, f"{zone.name}: growth per day by cause")
    if doors["count"]:
        sec.charts["doors"] = charts.hour_bars(by_hour, f"{zone.name}: door openings by hour")
    return sec


def _week_peak(store: Store, zone_id: str, week: Week, start_ts: float, end_ts: float) -> float | None:
    """The zone's highest air reading in [start_ts, end_ts] within the week's own readings."""
    return store.reports.peak(zone_id, "air_c", max(start_ts, week.start_ts), min(end_ts, week.end_ts - 1e-3))


def build(store: Store, cfg: Config, site: Site, week: Week, generated_ts: float) -> Report:
    """The week's summary as of generated_ts. A week that has not begun is refused; a week in
    progress covers its start to now and says so (Report.upto_ts)."""
    if generated_ts < week.start_ts:
        raise InputError(
            "--week", week.label, f"a week that has begun (this one starts {local_text(week.start_ts, week.tz)})"
        )
    upto_ts = min(week.end_ts, generated_ts)
    sw = load(store, cfg, site, week)
    # Each zone's figures stop at its newest reading when that is earlier than upto_ts.
    zones = [
        zone_section(store, sw, z, min(upto_ts, max(store.readings.newest_of(z.id) or 0.0, week.start_ts)))
        for z in sw.zones
    ]
    alerts = alert_table(sw.alerts, sw.alert_log, site.timezone, upto_ts)
    ids = tuple(z.id for z in sw.zones)
    comp = completeness(store.reports.sensor_weeks(ids, week.start_ts, week.end_ts), upto_ts - week.start_ts)
    gaps = sw.gaps.assign(minutes=(sw.gaps["seconds"] / 60.0).round(1)) if len(sw.gaps) else sw.gaps
    heads = store.record.heads()
    lots = lots_table(store, cfg, site, week)
    return Report(
        site=site,
        week=week,
        generated_ts=generated_ts,
        summary=summary_text(site, week, zones, alerts, comp, gaps, upto_ts),
        zones=zones,
        upto_ts=upto_ts,
        sections=[
            Section("lots", "Lots", lots, note=lots_note(lots), rows_key="ranked"),
            Section("alerts", "Alerts", alerts, "No alerts were active this week."),
            Section(
                "completeness",
                "Data completeness",
                comp,
                "No readings this week.",
                "Expected readings are counted at each sensor's own median interval over the whole week.",
            ),
            Section("gaps", "Gaps", gaps, "No data gaps recorded.", level=3),
            Section(
                "rejections",
                "Rejected messages by reason",
                rejection_table(sw.rejections),
                "No messages were rejected.",
                level=3,
            ),
        ],
        heads=heads,
        digest=chain.digest(heads),
        versions={"watcher": __version__, "model": MODEL_VERSION, "profiles": sorted({z.profile for z in zones})},
        cautions=[
            CAUTION,
            "Predictions are only as good as the product profile: calibrate it with your own storage trial.",
        ],
    )
