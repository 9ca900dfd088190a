"""The summary's lots: every lot that sat in the site's zones during the week, its figures at
the end of the week (or at its departure), ranked by texture life left, with those at risk
marked. Each lot is recomputed from its arrival up to that moment from the stored readings, so
a summary re-run later shows the same figures."""

from __future__ import annotations

import math

import pandas as pd

from watcher.engine.lots import LotKeeper, recompute_lot
from watcher.lots.events import stays
from watcher.lots.model import lot_figures
from watcher.lots.rank import AT_RISK_BUDGET_PCT, AT_RISK_DAYS, at_risk
from watcher.ranges import cautious_days

COLUMNS = [
    "rank",
    "lot",
    "product",
    "zone",
    "status",
    "budget_used_pct",
    "mean_diameter_um",
    "days_to_limit",
    "days_to_limit_low",
    "days_to_limit_high",
    "at_risk",
]


def lots_table(store, cfg, site, week) -> pd.DataFrame:
    zone_ids = {z.id for z in cfg.zones if z.site == site.id}
    keeper = LotKeeper(cfg, store)
    rows = []
    for item in store.lots.overview():
        periods = stays(item["history"])
        here = [
            (z, a, b) for z, a, b in periods if z in zone_ids and a < week.end_ts and (b is None or b > week.start_ts)
        ]
        if not here:
            continue
        until = week.end_ts if item["departed_ts"] is None else min(week.end_ts, item["departed_ts"])
        state = recompute_lot(cfg, store, item["lot"], until)
        f = lot_figures(keeper.spec(item["product"]), state)
        zone = next((z for z, a, b in reversed(periods) if a < until), here[-1][0])
        departed = item["departed_ts"] is not None and item["departed_ts"] <= week.end_ts
        days, budget = f["days_to_limit"], f["budget_used_pct"]
        cautious = cautious_days(f)
        rows.append(
            {
                "lot": item["lot"],
                "product": item["product"],
                "zone": zone,
                "status": "departed" if departed else "in store",
                "budget_used_pct": None if budget is None else round(budget, 1),
                "mean_diameter_um": None if f["mean_diameter_um"] is None else round(f["mean_diameter_um"], 1),
                "days_to_limit": None if days is None else round(days, 0),
                "days_to_limit_low": None if cautious is None else round(cautious, 0),
                "days_to_limit_high": None
                if f.get("days_to_limit_high") is None
                else round(f["days_to_limit_high"], 0),
                "at_risk": "yes" if at_risk(f) else "",
            }
        )
    rows.sort(key=lambda r: (r["days_to_limit"] if r["days_to_limit"] is not None else math.inf, r["lot"]))
    for i, r in enumerate(rows, 1):
        r["rank"] = i
    return pd.DataFrame(rows, columns=COLUMNS)


def lots_note(table: pd.DataFrame) -> str:
    if table.empty:
        return "No lot data are recorded for this site's zones this week: lots at risk cannot be listed."
    risky = int((table["at_risk"] == "yes").sum())
    return (
        f"{len(table)} lot(s) sat in these zones this week; {risky} at risk (under {AT_RISK_DAYS:.0f} days to the "
        f"texture limit at week-end conditions at the cautious end of the 90 % range, or {AT_RISK_BUDGET_PCT:.0f} % of "
        "the budget used). Ranked by texture life left: the first should leave first. Figures at the end of the "
        "week, or at departure; low and high: the 90 % range of the days left."
    )
