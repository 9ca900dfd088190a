"""Notification text: what happened, what it cost, what to check. Pure: dicts in, strings out."""

from __future__ import annotations

import datetime as dt
import html
from zoneinfo import ZoneInfo

from watcher.alerts.metrics import duration, metric, temperature
from watcher.caution import CAUTION
from watcher.ranges import figure_text

LATE_AFTER_S = 600.0  # a raise learnt this long after its data time says so


def auto_label(name: str, op: str, threshold: float, for_s: float = 0.0) -> str:
    m = metric(name)
    side = "at or above" if op == ">=" else "at or below"
    held = f" for {duration(for_s)}" if for_s else ""
    note = " (a benchmark, not a legal limit for ice cream)" if m.benchmark else ""
    return f"{m.words} {side} {m.format(threshold)}{held}{note}"


def fmt_value(name: str, value: float | None, temp_unit: str = "C") -> str:
    return metric(name).format(value, temp_unit)


def local(ts: float | None, tz: str) -> str:
    if ts is None:
        return "-"
    return dt.datetime.fromtimestamp(ts, ZoneInfo(tz)).strftime("%Y-%m-%d %H:%M")


def title(kind: str, alert: dict, zone_name: str, repeat: int = 0, site: str = "") -> str:
    """The subject: what kind of notice, where, what; the site last (a manager may run several)."""
    sev = alert["severity"].upper()
    tag = {
        "raise": sev,
        "repeat": f"{sev}, reminder {repeat}",
        "escalate": f"{sev}, not yet acknowledged",
        "clear": "back to normal",
        "over": f"{sev}, already over",
        "ack": "acknowledged",
    }[kind]
    return f"[{tag}] {zone_name}: {alert['label']}" + (f" - {site}" if site else "")


def body(
    kind: str,
    alert: dict,
    place: str,
    tz: str,
    figures: dict | None,
    events: list[dict],
    ack_topic: str,
    limit_um: float | None = None,
    by: str | None = None,
    note: str | None = None,
    temp_unit: str = "C",
) -> str:
    metric_of = metric(alert["metric"])

    def show(value) -> str:
        return metric_of.format(value, temp_unit)

    lines = [place, ""]
    now_value = show(alert.get("value"))
    if kind == "clear":
        lines.append(f"Cleared at {local(alert.get('cleared_ts'), tz)}: {metric_of.words} now {now_value}.")
    elif kind == "ack":
        lines.append(
            f"Acknowledged by {by} at {local(alert.get('acked_ts'), tz)}." + (f" Note: {note}" if note else "")
        )
    else:
        op = "at or above" if alert.get("op", ">=") == ">=" else "at or below"
        fired = show(alert.get("fired_value", alert.get("value")))
        since = local(alert.get("since_ts") or alert["raised_ts"], tz)
        learnt = alert.get("learnt_ts")
        if kind == "over":
            lines.append(
                f"What happened: {alert['label']}, from {since} to {local(alert.get('cleared_ts'), tz)} ({tz}). "
                f"When raised: {fired} ({op} {show(alert['threshold'])}); worst: {show(alert.get('worst_value'))}."
            )
            lines.append(
                f"Learnt late: its readings arrived at {local(learnt, tz)}, when it was already over. "
                "This is its only notice; it is in the record (watcher alerts) with both times."
            )
        else:
            latest = f" Latest: {now_value}." if kind != "raise" else ""
            lines.append(
                f"What happened: {alert['label']}. When raised: {fired} ({op} {show(alert['threshold'])}), "
                f"since {since} ({tz}).{latest}"
            )
            if kind == "raise" and learnt is not None and learnt - alert["raised_ts"] > LATE_AFTER_S:
                lines.append(
                    f"Learnt late: its readings arrived at {local(learnt, tz)}, "
                    f"{duration(learnt - alert['raised_ts'])} after it was raised in the readings' time."
                    + (
                        " It was open past the escalation time, so this goes to the escalation contacts too."
                        if alert.get("escalated_ts")
                        else ""
                    )
                )
        if alert.get("which"):
            lines.append(f"Which: {alert['which']}.")
    temps = []
    if figures and figures.get("air_c") is not None:
        temps.append(f"air {temperature(figures['air_c'], temp_unit)}")
    if figures and figures.get("product_c") is not None:
        temps.append(f"product (estimated, warmest position) {temperature(figures['product_c'], temp_unit)}")
    if temps:
        lines.append("Now: " + ", ".join(temps) + ".")
    if figures and figures.get("budget_used_pct") is not None:
        days = figures.get("days_to_limit")
        days_text = (
            "no limit in sight"
            if days is None
            else f"{figure_text(figures, 'days_to_limit', '.0f')} days to the limit at current conditions"
        )
        limit = f" of the {limit_um:g} um limit" if limit_um else ""
        lines.append(
            f"Texture so far: {figure_text(figures, 'budget_used_pct', '.1f')} % of the budget used (90 % ranges in "
            "brackets; worst position: "
            f"{figures.get('worst_position')}), mean crystal {figures.get('mean_diameter_um', 0):.1f} um{limit}, "
            f"{days_text}."
        )
    if events:
        lines.append("Events in the last 24 h:")
        for e in events[-8:]:
            span = f"{local(e['start_ts'], tz)} to {local(e['end_ts'], tz) if e['end_ts'] else 'now (still on)'}"
            cost = ""
            if e.get("excess_um") is not None:
                cost = f", cost {e['excess_um']:.2f} um ({e['budget_share_pct']:.2f} % of the budget, {e.get('cost')})"
            peak = f", peak {temperature(e['peak_c'], temp_unit)}" if e.get("peak_c") is not None else ""
            lines.append(f"  - {e['kind']} {span}{peak}{cost}")
    if kind in ("raise", "repeat", "escalate"):
        lines.append(f"What to check: {metric_of.check}")
        lines.append(
            f"Alert {alert['id']}. Acknowledge with: watcher ack {alert['id']} --by NAME, or publish "
            f'{{"alert": {alert["id"]}, "by": "NAME"}} to {ack_topic}.'
        )
    lines += ["", CAUTION]
    return "\n".join(lines)


def storage_bypass(
    rule, since_ts: float, now_ts: float, error: str, tz: str, repeat: bool, site: str = ""
) -> tuple[str, str]:
    """Title and body of the storage alert sent around the database (watcher.alerts.bypass)."""
    alert = {"severity": rule.severity, "label": rule.label}
    head = title("repeat" if repeat else "raise", alert, "watcher service", 1 if repeat else 0, site)
    lines = [
        f"What happened: {rule.label}. Readings have not been stored since {local(since_ts, tz)} ({tz}), "
        f"{duration(now_ts - since_ts)} so far. The last error: {error[:300]}",
        "Nothing is acknowledged while this lasts, so the broker keeps the readings (up to its queue limit) "
        "and watcher stores them as soon as the database can be written again.",
        f"What to check: {metric('commit_failing_s').check}",
        "This alert was sent without the database; it is recorded there, with a clear notice, once writing "
        "works again. It needs no acknowledgement.",
        "",
        CAUTION,
    ]
    return head, "\n".join(lines)


LEVELS = {"info": "info", "warning": "warning", "critical": "failure"}


def level(kind: str, severity: str) -> str:
    """What a channel shows as the message's urgency (apprise's notification types): a clear is
    good news, an acknowledgement is information, anything else carries the rule's severity."""
    if kind == "clear":
        return "success"
    return "info" if kind == "ack" else LEVELS.get(severity, "info")


def as_html(text: str) -> str:
    """A message body as simple HTML for e-mail: each line ends in <br>, a blank line stays a
    blank line, leading spaces are kept. Written so that apprise's plain-text alternative, made
    from this HTML, comes back line for line as the text was."""
    lines = []
    for line in text.strip().split("\n"):
        body = line.lstrip(" ")
        lines.append("&nbsp;" * (len(line) - len(body)) + html.escape(body))
    return '<div style="font-family: sans-serif; font-size: 14px; line-height: 1.45">' + "<br>".join(lines) + "</div>"
