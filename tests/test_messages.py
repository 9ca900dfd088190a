"""Notification text: what happened, what it cost, what to check, the caution; phone-sized."""

from watcher.alerts import messages

ALERT = {
    "id": 7,
    "zone": "dispatch",
    "severity": "warning",
    "label": "door open over 10 min",
    "metric": "door_open_s",
    "threshold": 600.0,
    "value": 840.0,
    "since_ts": 1_795_000_000.0,
    "raised_ts": 1_795_000_600.0,
    "op": ">=",
}
FIGURES = {"budget_used_pct": 41.3, "worst_position": "surface", "mean_diameter_um": 42.2, "days_to_limit": 61.0}
EVENTS = [
    {
        "kind": "defrost",
        "start_ts": 1_794_990_000.0,
        "end_ts": 1_794_991_800.0,
        "peak_c": -14.2,
        "excess_um": 0.021,
        "budget_share_pct": 0.09,
        "cost": "final",
    },
    {"kind": "door", "start_ts": 1_795_000_000.0, "end_ts": None, "peak_c": None},
]


def test_raise_message_says_what_happened_cost_and_checks():
    """A raise message says what happened, what it cost, what to check and how to acknowledge, with the caution."""
    body = messages.body(
        "raise",
        ALERT,
        "Kestrel Point - Dispatch freezer",
        "Europe/London",
        {**FIGURES, "air_c": -16.5, "product_c": -20.1},
        EVENTS,
        "watcher/ack",
        50.0,
    )
    assert "door open over 10 min. When raised: 14 min (at or above 10 min), since 2026-11-18 11:06" in body
    assert "Now: air -16.5 C, product (estimated, warmest position) -20.1 C." in body
    assert "41.3 % of the budget used" in body and "42.2 um of the 50 um limit" in body and "61 days" in body
    ranged = messages.body(
        "raise",
        ALERT,
        "Kestrel Point - Dispatch freezer",
        "Europe/London",
        {**FIGURES, "budget_used_pct_low": 20.5, "budget_used_pct_high": 77.0, "days_to_limit_low": 22.0,
         "days_to_limit_high": 150.0},
        [],
        "watcher/ack",
        50.0,
    )  # fmt: skip
    assert "41.3 (20.5-77.0) % of the budget used (90 % ranges in brackets" in ranged
    assert "61 (22-150) days to the limit" in ranged
    assert (
        "defrost 2026-11-18 08:20 to 2026-11-18 08:50, peak -14.2 C, cost 0.02 um (0.09 % of the budget, final)" in body
    )
    assert "door 2026-11-18 11:06 to now (still on)" in body
    assert "failed closer" in body and "watcher ack 7 --by NAME" in body and "not a food-safety verdict" in body
    assert len(body) < 1200  # readable on a phone
    assert messages.title("raise", ALERT, "Dispatch freezer") == "[WARNING] Dispatch freezer: door open over 10 min"
    assert messages.title("raise", ALERT, "Dispatch freezer", site="Kestrel Point").endswith(" - Kestrel Point")
    assert messages.title("repeat", ALERT, "Dispatch freezer", 2).startswith("[WARNING, reminder 2]")


def test_clear_and_ack_notices_are_short():
    """Clear and acknowledgement notices are short and say who and when."""
    clear = messages.body(
        "clear",
        {**ALERT, "value": 0.0, "cleared_ts": 1_795_001_500.0},
        "Kestrel Point - Dispatch",
        "UTC",
        None,
        [],
        "watcher/ack",
    )
    assert "Cleared at 2026-11-18 11:31: door open now 0 s." in clear and "watcher ack" not in clear
    ack = messages.body(
        "ack",
        {**ALERT, "acked_ts": 1_795_000_700.0},
        "Kestrel Point",
        "UTC",
        None,
        [],
        "watcher/ack",
        by="Dana",
        note="wedge removed",
    )
    assert "Acknowledged by Dana at 2026-11-18 11:18. Note: wedge removed" in ack


def test_values_carry_units():
    """Every metric's value is shown with its unit."""
    assert messages.fmt_value("air_c", -17.96) == "-18.0 C"
    assert messages.fmt_value("budget_used_pct", 80.04) == "80.0 %"
    assert messages.fmt_value("event_excess_um", 1.234) == "1.23 um"
    assert messages.fmt_value("reading_age_s", 5400) == "1.5 h"
    assert messages.fmt_value("days_to_limit", 13.6) == "14 days"


def test_message_levels_follow_severity_and_kind():
    """What a channel shows as urgency: the rule's severity for a raise, repeat or escalation;
    success for an all-clear; info for an acknowledgement."""
    from watcher.alerts.messages import level

    assert [level(k, "warning") for k in ("raise", "repeat", "escalate", "ack", "clear")] == [
        "warning",
        "warning",
        "warning",
        "info",
        "success",
    ]
    assert (level("raise", "critical"), level("raise", "info")) == ("failure", "info")


def test_a_reminder_labels_the_value_that_fired_and_the_latest():
    """A reminder says the value the alert was raised at and the latest one, each labelled, so
    a value that has since come back under the threshold never reads as 'now ... at or above'."""
    alert = {**ALERT, "value": 540.0, "fired_value": 840.0}
    body = messages.body("repeat", alert, "Kestrel Point - Dispatch freezer", "Europe/London", None, [], "watcher/ack")
    assert "When raised: 14 min (at or above 10 min)" in body and "Latest: 9 min." in body


def test_a_value_that_rounds_to_zero_has_no_sign():
    """-0.0004 % reads as 0.0 %, not -0.0 %."""
    assert messages.fmt_value("event_budget_share_pct", -0.0004) == "0.0 %"
    assert messages.fmt_value("air_c", -0.04) == "0.0 C" and messages.fmt_value("air_c", -18.04) == "-18.0 C"


def test_a_site_that_reads_fahrenheit_gets_every_temperature_in_f():
    """temp_unit = "F": the values, thresholds, temperatures now and event peaks of a message
    are in F (converted exactly: -18 C is -0.4 F, -25 C is -13 F); a spread of 3 K is 5.4 F.
    Durations and percentages are unchanged."""
    assert messages.fmt_value("air_c", -25.0, "F") == "-13.0 F"
    assert messages.fmt_value("sensor_spread_k", 3.0, "F") == "5.4 F"
    assert messages.fmt_value("door_open_s", 840.0, "F") == "14 min"
    alert = {**ALERT, "metric": "air_c", "threshold": -18.0, "value": -10.0, "fired_value": -17.5}
    body = messages.body(
        "raise",
        alert,
        "Kestrel Point - Dispatch",
        "UTC",
        {"air_c": -25.0, "product_c": -20.0},
        EVENTS,
        "a",
        temp_unit="F",
    )
    assert "When raised: 0.5 F (at or above -0.4 F)" in body, body
    assert "air -13.0 F" in body and "product (estimated, warmest position) -4.0 F" in body
    assert "peak 6.4 F" in body and " C" not in body.replace("-18 C is a benchmark", "")


def test_an_alert_learnt_after_it_ended_is_told_once_with_both_times():
    """A backlog's alert that began and ended before its readings arrived: its subject says it
    is already over; the body gives its span in data time, the value that fired, the worst, and
    when the readings arrived; there is nothing to acknowledge."""
    alert = {**ALERT, "cleared_ts": 1_795_001_320.0, "worst_value": 1320.0, "fired_value": 600.0}
    alert["learnt_ts"] = 1_795_020_000.0
    assert messages.title("over", alert, "Dispatch", site="Kestrel Point") == (
        "[WARNING, already over] Dispatch: door open over 10 min - Kestrel Point"
    )
    body = messages.body("over", alert, "Kestrel Point - Dispatch", "UTC", None, [], "watcher/ack")
    assert "from 2026-11-18 11:06 to 2026-11-18 11:28 (UTC)" in body, body
    assert "When raised: 10 min (at or above 10 min); worst: 22 min." in body
    assert "Learnt late: its readings arrived at 2026-11-18 16:40" in body and "watcher ack" not in body
    assert messages.level("over", "critical") == "failure"
