"""Figures with their 90 % range (from the profile's rate uncertainty), as data and as
compact text for tables and messages. Pure: no I/O."""

from __future__ import annotations

#: 90 % ranges from the profile's rate factor; days_to_limit_low is the cautious end.
RANGE_KEYS = ("budget_used_pct_low", "budget_used_pct_high", "days_to_limit_low", "days_to_limit_high")


def with_range(value, low, high, spec: str, none: str = "-") -> str:
    """'410 (190-900)': a figure with its 90 % range, compact enough for a table cell; the
    range is left out where it is unknown or equals the figure."""
    if value is None:
        return none
    text = format(value, spec)
    if low is None and high is None:
        return text
    lo = none if low is None else format(low, spec)
    hi = "never" if high is None else format(high, spec)
    return text if lo == hi == text else f"{text} ({lo}-{hi})"


def range_of(figures: dict, key: str) -> tuple:
    """(value, low, high) of budget_used_pct or days_to_limit from a figures dict."""
    return figures.get(key), figures.get(f"{key}_low"), figures.get(f"{key}_high")


def figure_text(figures: dict, key: str, spec: str, none: str = "-") -> str:
    """A figure of a figures dict with its 90 % range, as ``with_range`` writes it."""
    return with_range(*range_of(figures, key), spec, none)


def cautious_days(figures: dict):
    """The days left that rules and risk marks judge: the cautious (low) end of the range,
    or the figure itself where no range is known."""
    return figures.get("days_to_limit_low", figures.get("days_to_limit"))
