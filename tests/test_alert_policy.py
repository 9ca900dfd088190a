"""The alert policy: hold times, hysteresis, repeats, escalation, acknowledgement, latching."""

import pytest

from watcher.alerts.policy import Rule, acknowledge, default_rules, evaluate
from watcher.errors import NotFound

AIR = Rule("air-benchmark", "air_c", ">=", -18.0, "warning", for_s=1800.0, hysteresis=1.0)
BUDGET = Rule("budget-80", "budget_used_pct", ">=", 80.0, "warning", latch=True)


def run(rules, series, repeat_s=3600.0, escalate_s=7200.0, states=None, zone="bulk-a"):
    """Feed (time, observations) pairs; return the final states and every action."""
    states = states or {}
    actions = []
    for t, obs in series:
        states, acts = evaluate(rules, zone, obs, t, states, repeat_s, escalate_s)
        actions += acts
    return states, actions


def test_raised_only_after_the_hold_time():
    """A condition must hold for_s before the alert is raised; a short spike raises nothing."""
    _, short = run([AIR], [(0, {"air_c": -15}), (600, {"air_c": -15}), (1200, {"air_c": -25})])
    assert short == []
    _, long = run([AIR], [(t, {"air_c": -15}) for t in range(0, 2400, 300)])
    assert [a.kind for a in long] == ["raise"] and long[0].at_ts == 1800


def test_hysteresis_prevents_flapping_and_clear_is_notified():
    """Hovering around the threshold does not clear; only passing it by the hysteresis does."""
    series = [(t, {"air_c": -15}) for t in range(0, 2100, 300)]
    series += [(2100 + 300 * k, {"air_c": v}) for k, v in enumerate([-18.5, -17.5, -18.8, -17.9, -19.5])]
    states, actions = run([AIR], series, repeat_s=1e9)
    assert [a.kind for a in actions] == ["raise", "clear"]
    assert actions[-1].value == -19.5
    assert states[("bulk-a", "air-benchmark")].status == "quiet"


def test_repeats_until_acknowledged_and_escalates_once():
    """Open alerts repeat every repeat_s, escalate once after escalate_s; acknowledging stops both."""
    states, actions = run(
        [AIR], [(t, {"air_c": -10}) for t in range(0, 5 * 3600 + 1, 600)], repeat_s=3600, escalate_s=2 * 3600
    )
    kinds = [a.kind for a in actions]
    assert kinds[0] == "raise" and kinds.count("escalate") == 1 and kinds.count("repeat") >= 2
    states = acknowledge(states, "bulk-a", "air-benchmark", "Priya (QA)", 5 * 3600 + 60)
    assert states[("bulk-a", "air-benchmark")].acked_by == "Priya (QA)"
    states, more = run([AIR], [(t, {"air_c": -10}) for t in range(5 * 3600 + 600, 9 * 3600, 600)], states=states)
    assert more == []
    states, last = run([AIR], [(9 * 3600, {"air_c": -25})], states=states)
    assert [a.kind for a in last] == ["clear"]


def test_one_open_alert_per_zone_and_rule():
    """While an alert is open, the same condition never raises a second one; other zones are separate."""
    states, actions = run([AIR], [(t, {"air_c": -10}) for t in range(0, 3 * 3600, 300)], repeat_s=1e9, escalate_s=1e9)
    assert [a.kind for a in actions] == ["raise"]
    _, other = run(
        [AIR],
        [(t, {"air_c": -10}) for t in range(0, 3 * 3600, 300)],
        states=states,
        zone="dispatch",
        repeat_s=1e9,
        escalate_s=1e9,
    )
    assert [(a.kind, a.zone) for a in other] == [("raise", "dispatch")]


def test_latched_budget_alert_never_clears_by_itself():
    """Texture damage does not heal: a budget alert stays until acknowledged, even if figures dip."""
    states, actions = run(
        [BUDGET], [(0, {"budget_used_pct": 81}), (3600, {"budget_used_pct": 20})], repeat_s=1e9, escalate_s=1e9
    )
    assert [a.kind for a in actions] == ["raise"]
    assert states[("bulk-a", "budget-80")].status == "open"


def test_missing_observations_change_nothing():
    """A metric that cannot be judged (None or absent) leaves its rule as it was."""
    states, actions = run([AIR], [(0, {"air_c": None}), (60, {})])
    assert actions == [] and states == {}


def test_acknowledging_nothing_is_an_error():
    """Acknowledging a rule with no open alert is refused with NotFound."""
    with pytest.raises(NotFound, match="no open alert"):  # was KeyError: control flow by KeyError is gone
        acknowledge({}, "bulk-a", "air-benchmark", "x", 0)


def test_default_rules_are_valid_and_label_the_benchmark():
    """Defaults cover every required rule; the -18 C rules say they are benchmarks."""
    rules = {r.id: r for r in default_rules()}
    for rid in (
        "budget-50",
        "budget-80",
        "budget-100",
        "event-cost",
        "days-left",
        "air-benchmark",
        "product-benchmark",
        "door-open",
        "defrost-long",
        "defrosts-per-day",
        "sensor-stale",
        "sensors-disagree",
        "rejections",
        "broker-down",
    ):
        assert rid in rules
    assert (
        "not a legal limit" in rules["air-benchmark"].label and "not a legal limit" in rules["product-benchmark"].label
    )
    with pytest.raises(ValueError, match="severity"):
        Rule("x", "air_c", ">=", 0.0, "loud")


def test_clear_waits_for_the_value_to_stay_back():
    """With clear_for_s, a value that dips back only briefly (a door spike in the recovery)
    keeps the alert open; it clears once the value has stayed back that long."""
    rule = Rule("air", "air_c", ">=", -18.0, hysteresis=1.0, clear_for_s=1800.0)
    states, acts = evaluate([rule], "z", {"air_c": -17.0}, 0.0, {}, 3600.0, 7200.0)
    assert [a.kind for a in acts] == ["raise"]
    for t, v in ((600.0, -20.0), (1200.0, -17.5), (1800.0, -20.0), (3000.0, -20.0)):
        states, acts = evaluate([rule], "z", {"air_c": v}, t, states, 3600.0, 7200.0)
        assert acts == []  # back at 600 s, warm again at 1200 s, back since 1800 s: not yet 30 min
    states, acts = evaluate([rule], "z", {"air_c": -20.0}, 3600.0, states, 3600.0, 7200.0)
    assert [a.kind for a in acts] == ["clear"]
