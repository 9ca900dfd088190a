"""Notification text: what happened, what it cost, what to check. Pure: dicts in, strings out."""

from __future__ import annotations

import datetime as dt
from zoneinfo import ZoneInfo

from watcher.ranges import figure_text

CAUTION = (
    "Texture prediction, not a food-safety verdict: hold/release and safety decisions follow your "
    "food-safety plan and local rules. -18 C is a benchmark for quick-frozen foods, not a legal "
    "limit for ice cream. Refrigeration faults are for a licensed technician."
)

CHECK = {
    "budget_used_pct": "Which lots sit in this zone and how long: ship the oldest first. The weekly summary shows "
    "where the budget went (defrosts, doors, excursions).",
    "days_to_limit": "Whether the room runs warmer than its setpoint, and which lots will reach the limit first.",
    "event_budget_share_pct": "The event listed below: was it a defrost that ran long, a door held open, a fault?",
    "event_excess_um": "The event listed below: was it a defrost that ran long, a door held open, a fault?",
    "air_c": "Evaporator and fans, a defrost that has not ended, the door and strip curtain, the compressor.",
    "product_c": "Whether warm stock was loaded, and the air temperature record; check with a product probe.",
    "door_open_s": "The door: blocked open, a failed closer, the strip or air curtain.",
    "defrost_s": "The defrost termination (thermostat or timer) and the heaters.",
    "defrosts_today": "The defrost controller's schedule; heavy frost can mean failing door seals or humid air.",
    "sensor_spread_k": "Sensor placement (one near a door or an evaporator outlet?) or a failing sensor; compare "
    "with a reference thermometer.",
    "reading_age_s": "The sensor's power or battery, its network link, and the gateway that publishes it.",
    "broker_down_s": "The site broker and the network between it and this machine. Readings queue at the broker "
    "while the link is down.",
    "rejections_per_h": "`watcher status` and the rejections table: a sensor or gateway sending bad messages.",
    "undelivered_s": "The failing notification channel (its error is kept in the outbox table).",
    "commit_failing_s": "Free disk space for the database, or a process holding it locked.",
    "clock_jump_s": "The machine's time source (NTP, the real-time clock and its battery); `timedatectl` shows it. "
    "Times recorded around the jump may be off by its size.",
    "held_readings": "Which clock is wrong: this machine's (`timedatectl`) or the gateway's. Held readings go in by "
    "themselves once the two agree; nothing is lost while they wait.",
    "lot_budget_used_pct": "Ship this lot before fresher ones (`watcher lots` ranks them); look at where it has been "
    "stored (`watcher lot show`).",
    "lot_days_to_limit": "Ship this lot before fresher ones (`watcher lots` ranks them).",
}

WORDS = {
    "budget_used_pct": "texture budget used",
    "days_to_limit": "days to the texture limit",
    "event_budget_share_pct": "one event's share of the budget",
    "event_excess_um": "one event's extra crystal growth",
    "air_c": "air temperature",
    "product_c": "estimated product temperature",
    "door_open_s": "door open",
    "defrost_s": "defrost running",
    "defrosts_today": "defrosts today",
    "sensor_spread_k": "air sensors disagree",
    "reading_age_s": "no reading",
    "broker_down_s": "no broker connection",
    "rejections_per_h": "rejected messages in the last hour",
    "undelivered_s": "a notification channel failing",
    "commit_failing_s": "readings not stored",
    "clock_jump_s": "service clock jumped by",
    "held_readings": "readings held for a clock disagreement",
    "lot_budget_used_pct": "lot's texture budget used",
    "lot_days_to_limit": "lot's days to the texture limit",
}


def auto_label(metric: str, op: str, threshold: float, for_s: float = 0.0) -> str:
    side = "at or above" if op == ">=" else "at or below"
    held = f" for {duration(for_s)}" if for_s else ""
    note = " (a benchmark, not a legal limit for ice cream)" if metric in ("air_c", "product_c") else ""
    return f"{WORDS.get(metric, metric)} {side} {fmt_value(metric, threshold)}{held}{note}"


UNITS = {"_pct": " %", "_um": " um", "_c": " C", "_k": " K", "_per_h": " per hour"}


def fmt_value(metric: str, value: float | None) -> str:
    if value is None:
        return "unknown"
    if metric.endswith("_s"):
        return duration(value)
    if metric in ("days_to_limit", "lot_days_to_limit"):
        return f"{value:.0f} days"
    if metric == "defrosts_today":
        return f"{value:.0f}"
    for suffix, unit in UNITS.items():
        if metric.endswith(suffix):
            return f"{value:.2f}{unit}" if suffix == "_um" else f"{value:.1f}{unit}"
    return f"{value:g}"


def duration(seconds: float) -> str:
    seconds = max(0.0, float(seconds))
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    if seconds < 2 * 86400:
        return f"{seconds / 3600:.1f} h"
    return f"{seconds / 86400:.1f} days"


def local(ts: float | None, tz: str) -> str:
    if ts is None:
        return "-"
    return dt.datetime.fromtimestamp(ts, ZoneInfo(tz)).strftime("%Y-%m-%d %H:%M")


def title(kind: str, alert: dict, zone_name: str, repeat: int = 0) -> str:
    sev = alert["severity"].upper()
    tag = {
        "raise": sev,
        "repeat": f"{sev}, reminder {repeat}",
        "escalate": f"{sev}, not yet acknowledged",
        "clear": "back to normal",
        "ack": "acknowledged",
    }[kind]
    return f"[{tag}] {zone_name}: {alert['label']}"


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
) -> str:
    metric = alert["metric"]
    lines = [place, ""]
    now_value = fmt_value(metric, alert.get("value"))
    if kind == "clear":
        lines.append(f"Cleared at {local(alert.get('cleared_s'), tz)}: {WORDS.get(metric, metric)} now {now_value}.")
    elif kind == "ack":
        lines.append(f"Acknowledged by {by} at {local(alert.get('acked_s'), tz)}." + (f" Note: {note}" if note else ""))
    else:
        op = "at or above" if alert.get("op", ">=") == ">=" else "at or below"
        lines.append(
            f"What happened: {alert['label']}. Now {now_value} ({op} {fmt_value(metric, alert['threshold'])}), "
            f"since {local(alert.get('since_s') or alert['raised_s'], tz)} ({tz})."
        )
    temps = []
    if figures and figures.get("air_c") is not None:
        temps.append(f"air {figures['air_c']:.1f} C")
    if figures and figures.get("product_c") is not None:
        temps.append(f"product (estimated, warmest position) {figures['product_c']:.1f} C")
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
            peak = f", peak {e['peak_c']:.1f} C" if e.get("peak_c") is not None else ""
            lines.append(f"  - {e['kind']} {span}{peak}{cost}")
    if kind in ("raise", "repeat", "escalate"):
        lines.append(f"What to check: {CHECK.get(metric, 'the zone and its sensors.')}")
        lines.append(
            f"Alert {alert['id']}. Acknowledge with: watcher ack {alert['id']} --by NAME, or publish "
            f'{{"alert": {alert["id"]}, "by": "NAME"}} to {ack_topic}.'
        )
    lines += ["", CAUTION]
    return "\n".join(lines)


def storage_bypass(rule, since_s: float, now_s: float, error: str, tz: str, repeat: bool) -> tuple[str, str]:
    """Title and body of the storage alert sent around the database (watcher.alerts.bypass)."""
    alert = {"severity": rule.severity, "label": rule.label}
    head = title("repeat" if repeat else "raise", alert, "watcher service", 1 if repeat else 0)
    lines = [
        f"What happened: {rule.label}. Readings have not been stored since {local(since_s, tz)} ({tz}), "
        f"{duration(now_s - since_s)} so far. The last error: {error[:300]}",
        "Nothing is acknowledged while this lasts, so the broker keeps the readings (up to its queue limit) "
        "and watcher stores them as soon as the database can be written again.",
        f"What to check: {CHECK['commit_failing_s']}",
        "This alert was sent without the database; it is recorded there, with a clear notice, once writing "
        "works again. It needs no acknowledgement.",
        "",
        CAUTION,
    ]
    return head, "\n".join(lines)
