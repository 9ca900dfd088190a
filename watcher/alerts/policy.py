"""Alert rules and lifecycle. Pure: observations and times in, actions out; no clock, no I/O.

One open alert per (zone, rule). An alert is raised when its condition has held for `for_s`,
notified at once, repeated every `repeat_s` while nobody acknowledges it, escalated once after
`escalate_s`, and cleared (with a clear notice) when the value is back past the threshold by
the rule's hysteresis. Latched rules (budget levels: texture damage does not heal) never clear
by themselves; acknowledging them stops the repeats. Every transition is an Action for the
caller to store and deliver.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

from watcher.alerts.metrics import METRICS as _METRICS
from watcher.alerts.metrics import PER_LOT, WALL_CLOCK
from watcher.errors import NotFound

SEVERITIES = ("info", "warning", "critical")
# The metrics and their properties live in metrics.py; these are their names by clock (zone
# rules are judged on the zone's data time, so a replay or a late sensor clock still gives the
# right durations; wall-clock rules on the service's own clock; lot rules per lot).
METRICS = tuple(_METRICS)
WALL_CLOCK_METRICS = WALL_CLOCK
LOT_METRICS = PER_LOT  # judged per lot (the alert's subject is the lot: store/subjects.py)


@dataclass(frozen=True)
class Rule:
    id: str
    metric: str  # a key of the observations, e.g. "budget_used_pct", "air_c", "reading_age_s"
    op: str  # ">=" raises at or above the threshold, "<=" at or below
    threshold: float
    severity: str = "warning"
    for_s: float = 0.0
    hysteresis: float = 0.0
    latch: bool = False
    label: str = ""
    zones: tuple[str, ...] = ()  # empty: every zone
    clear_for_s: float = 0.0  # the value must stay past the hysteresis this long before the alert clears

    def applies_to(self, zone: str) -> bool:
        return not self.zones or zone in self.zones

    def __post_init__(self) -> None:
        if self.op not in (">=", "<="):
            raise ValueError(f"rule {self.id}: op {self.op!r}, expected '>=' or '<='")
        if self.severity not in SEVERITIES:
            raise ValueError(f"rule {self.id}: severity {self.severity!r}, expected one of {', '.join(SEVERITIES)}")
        if self.for_s < 0 or self.hysteresis < 0:
            raise ValueError(f"rule {self.id}: for_s and hysteresis must be 0 or more")

    def holds(self, value: float) -> bool:
        return value >= self.threshold if self.op == ">=" else value <= self.threshold

    def cleared(self, value: float) -> bool:
        if self.op == ">=":
            return value < self.threshold - self.hysteresis
        return value > self.threshold + self.hysteresis


@dataclass(frozen=True)
class AlertState:
    zone: str
    rule: str
    status: str = "quiet"  # quiet | pending | open | acknowledged
    since_ts: float | None = None  # when the condition started holding
    raised_ts: float | None = None
    notified_ts: float | None = None
    escalated: bool = False
    acked_by: str | None = None
    acked_ts: float | None = None
    value: float | None = None
    alert_id: int | None = None  # the stored alert row, once raised
    clearing_since_ts: float | None = None  # when the value went back past the hysteresis
    worst: float | None = None  # the worst value since it was raised (judged at every step)


@dataclass(frozen=True)
class Action:
    kind: str  # raise | repeat | escalate | clear
    zone: str
    rule: str
    severity: str
    value: float | None
    at_ts: float
    worst: float | None = None  # the worst value since the raise, this step included


def evaluate(
    rules: list[Rule], zone: str, observations: dict, now_ts: float, states: dict, repeat_s: float, escalate_s: float
) -> tuple[dict, list[Action]]:
    """Advance every (zone, rule) state by one observation; return new states and actions.

    A missing or None observation leaves a rule unchanged (it cannot be judged).
    """
    states = dict(states)
    actions: list[Action] = []
    for rule in rules:
        if not rule.applies_to(zone):
            continue
        key = (zone, rule.id)
        st = states.get(key, AlertState(zone, rule.id))
        value = observations.get(rule.metric)
        if value is None:
            continue
        value = float(value)
        if st.status in ("quiet", "pending"):
            if rule.holds(value):
                since = st.since_ts if st.status == "pending" else now_ts
                if now_ts - since >= rule.for_s:
                    st = replace(
                        st,
                        status="open",
                        since_ts=since,
                        raised_ts=now_ts,
                        notified_ts=now_ts,
                        escalated=False,
                        acked_by=None,
                        acked_ts=None,
                        value=value,
                        alert_id=None,
                        worst=value,
                    )
                    actions.append(Action("raise", zone, rule.id, rule.severity, value, now_ts, value))
                else:
                    st = replace(st, status="pending", since_ts=since, value=value)
            elif st.status == "pending":
                st = AlertState(zone, rule.id)
        else:  # open or acknowledged
            worst = value if st.worst is None else (max if rule.op == ">=" else min)(st.worst, value)
            st = replace(st, value=value, worst=worst)
            back = not rule.latch and rule.cleared(value)
            clearing = (st.clearing_since_ts if st.clearing_since_ts is not None else now_ts) if back else None
            st = replace(st, clearing_since_ts=clearing)
            if back and now_ts - clearing >= rule.clear_for_s:
                actions.append(Action("clear", zone, rule.id, rule.severity, value, now_ts, worst))
                st = AlertState(zone, rule.id)
            elif st.status == "open":
                if not st.escalated and now_ts - st.raised_ts >= escalate_s:
                    st = replace(st, escalated=True, notified_ts=now_ts)
                    actions.append(Action("escalate", zone, rule.id, rule.severity, value, now_ts, worst))
                elif now_ts - st.notified_ts >= repeat_s:
                    st = replace(st, notified_ts=now_ts)
                    actions.append(Action("repeat", zone, rule.id, rule.severity, value, now_ts, worst))
        states[key] = st
    return states, actions


def acknowledge(states: dict, zone: str, rule_id: str, by: str, now_ts: float) -> dict:
    """Mark an open alert acknowledged (stops repeats and escalation); NotFound if none."""
    key = (zone, rule_id)
    st = states.get(key)
    if st is None or st.status != "open":
        raise NotFound(f"no open alert for zone {zone!r}, rule {rule_id!r}")
    states = dict(states)
    states[key] = replace(st, status="acknowledged", acked_by=by, acked_ts=now_ts)
    return states


# Default rules that no longer exist, and why: a configuration that still names one is told.
RETIRED_RULES = {
    "event-um": "merged into event-cost: one alert per event, its message giving both the budget share and the "
    'micrometres (add a rule with metric = "event_excess_um" to judge micrometres too)',
}


def default_rules() -> list[Rule]:
    """Sensible defaults; every one is a setting. The -18 C rules are benchmarks, not legal limits."""
    return [
        Rule("budget-50", "budget_used_pct", ">=", 50.0, "info", latch=True, label="half the texture budget used"),
        Rule(
            "budget-80", "budget_used_pct", ">=", 80.0, "warning", latch=True, label="80 % of the texture budget used"
        ),
        Rule("budget-100", "budget_used_pct", ">=", 100.0, "critical", latch=True, label="texture limit reached"),
        Rule(
            "lot-50",
            "lot_budget_used_pct",
            ">=",
            50.0,
            "info",
            latch=True,
            label="lot has used half its texture budget",
        ),
        Rule(
            "lot-80", "lot_budget_used_pct", ">=", 80.0, "warning", latch=True, label="lot has used 80 % of its budget"
        ),
        Rule("lot-100", "lot_budget_used_pct", ">=", 100.0, "critical", latch=True, label="lot at its texture limit"),
        Rule(
            "days-left",
            "days_to_limit",
            "<=",
            14.0,
            "warning",
            for_s=6 * 3600.0,  # days_to_limit follows the product temperature: a defrost is not a trend
            hysteresis=3.0,
            label="under two weeks to the texture limit (cautious end of the range)",
        ),
        Rule(
            "event-cost", "event_budget_share_pct", ">=", 2.0, "warning", label="one event used over 2 % of the budget"
        ),
        Rule(
            "air-benchmark",
            "air_c",
            ">=",
            -18.0,
            "warning",
            for_s=1800.0,
            hysteresis=1.0,
            clear_for_s=1800.0,  # door spikes during recovery keep it open rather than re-raising
            label="air above -18 C for 30 min (a benchmark for quick-frozen foods, not a legal limit for ice cream)",
        ),
        Rule(
            "product-benchmark",
            "product_c",
            ">=",
            -18.0,
            "critical",
            for_s=900.0,
            hysteresis=0.5,
            clear_for_s=1800.0,
            label="product above -18 C (a benchmark, not a legal limit for ice cream)",
        ),
        Rule("door-open", "door_open_s", ">=", 600.0, "warning", hysteresis=599.0, label="door open over 10 min"),
        Rule("defrost-long", "defrost_s", ">=", 3600.0, "warning", hysteresis=3599.0, label="defrost over an hour"),
        Rule(
            "defrosts-per-day",
            "defrosts_today",
            ">=",
            7.0,
            "warning",
            hysteresis=1.0,
            label="more than 6 defrosts today",
        ),
        Rule("sensor-stale", "reading_age_s", ">=", 900.0, "warning", hysteresis=300.0, label="no reading for 15 min"),
        Rule(
            "sensors-disagree",
            "sensor_spread_k",
            ">=",
            3.0,
            "warning",
            for_s=900.0,
            hysteresis=1.0,
            label="air sensors disagree by over 3 K",
        ),
        Rule("rejections", "rejections_per_h", ">=", 60.0, "warning", hysteresis=30.0, label="many rejected messages"),
        Rule(
            "broker-down",
            "broker_down_s",
            ">=",
            300.0,
            "critical",
            hysteresis=299.0,
            label="no broker connection for 5 min",
        ),
        Rule(
            "undelivered",
            "undelivered_s",
            ">=",
            600.0,
            "warning",
            hysteresis=599.0,
            label="a notification channel has failed for 10 min",
        ),
        Rule(
            "storage-failing",
            "commit_failing_s",
            ">=",
            60.0,
            "critical",
            hysteresis=59.0,
            label="readings cannot be stored (disk full or database locked); nothing is acknowledged",
        ),
        Rule(
            "clock-jump",
            "clock_jump_s",
            ">=",
            60.0,
            "warning",
            hysteresis=59.0,
            label="the service clock jumped by a minute or more",
        ),
        Rule(
            "readings-held",
            "held_readings",
            ">=",
            1.0,
            "warning",
            for_s=300.0,
            hysteresis=0.5,
            label="readings held: their time disagrees with the service clock",
        ),
    ]
