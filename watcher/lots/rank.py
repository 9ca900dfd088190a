"""Which lots should leave first, and which are at risk: one rule for `watcher lots`, the
weekly summary and the site page. Pure."""

from __future__ import annotations

from watcher.ranges import cautious_days

AT_RISK_DAYS = 14.0  # fewer days to the limit (cautious end) than this, as the days-left rule
AT_RISK_BUDGET_PCT = 80.0  # or at least this share of the budget used


def rank_key(row: dict):
    """Least texture life left first: days to the limit, then budget used; lots not yet
    computed last (rows of store.lots.overview)."""
    f = row["figures"] or {}
    days = f.get("days_to_limit")
    return (not f, days if days is not None else float("inf"), -(f.get("budget_used_pct") or 0.0), row["lot"])


def at_risk(figures: dict | None) -> bool:
    """Under AT_RISK_DAYS at the cautious end of the range, or AT_RISK_BUDGET_PCT used."""
    if not figures:
        return False
    cautious = cautious_days(figures)
    budget = figures.get("budget_used_pct")
    return (cautious is not None and cautious < AT_RISK_DAYS) or (budget or 0.0) >= AT_RISK_BUDGET_PCT
