"""Checks between tables that a hash chain alone cannot make. Pure SQL reads.

The alerts table is a working table (its status changes), so it is not chained; its chained
witness is the alert log, which gets one row per step (raise, repeat, escalate, ack, clear,
sent). Every alert must agree with its log, and every log step must belong to an alert: a
deleted alert, an alert quietly marked cleared or acknowledged, or a log row cut from the end
of the chain then shows. Each notification the outbox marks as sent for an alert must have its
`sent` step in the log.
"""

from __future__ import annotations

from collections import Counter, defaultdict

from watcher.store.chain import Finding


def _steps(conn) -> dict[int, list[tuple]]:
    out: dict[int, list[tuple]] = defaultdict(list)
    for alert_id, step, at_ts, by, note in conn.execute(
        "SELECT alert_id, step, at_ts, by, note FROM alert_log ORDER BY id"
    ):
        out[alert_id].append((step, at_ts, by, note))
    return out


def check_alerts(conn) -> list[Finding]:
    steps = _steps(conn)
    out = []
    alerts = conn.execute(
        "SELECT id, status, raised_ts, acked_ts, acked_by, cleared_ts, escalated_ts, repeats FROM alerts ORDER BY id"
    ).fetchall()
    known = {a[0] for a in alerts}
    for alert_id in sorted(set(steps) - known):
        what = f"alert {alert_id} is gone from the alerts table; its log has {len(steps[alert_id])} steps"
        out.append(Finding("alerts", alert_id, what, "MISSING"))
    for alert_id, status, raised_ts, acked_ts, acked_by, cleared_ts, escalated_ts, repeats in alerts:
        log = steps.get(alert_id, [])
        kinds = Counter(s[0] for s in log)

        def at(kind: str, log=log):
            return next((s for s in log if s[0] == kind), None)

        wrong = []
        raise_step = at("raise")
        if raise_step is None:
            wrong.append("no raise step in the log")
        elif raise_step[1] != raised_ts:
            wrong.append("raised at another time than its log says")
        ack = at("ack")
        if (status == "acknowledged" or acked_ts is not None) and (
            ack is None or (ack[1], ack[2]) != (acked_ts, acked_by)
        ):
            wrong.append("acknowledged without the matching ack step (who, when)")
        elif ack is not None and acked_ts is None:
            wrong.append("its log has an ack step the alert does not show")
        clear = at("clear")
        if (status == "cleared" or cleared_ts is not None) and (clear is None or clear[1] != cleared_ts):
            wrong.append("cleared without the matching clear step")
        elif clear is not None and status != "cleared":
            wrong.append(f"its log says cleared, the alert says {status}")
        if (escalated_ts is not None) != ("escalate" in kinds):
            wrong.append("escalation and its log step disagree")
        if repeats != kinds.get("repeat", 0):
            wrong.append(f"{repeats} repeats recorded, {kinds.get('repeat', 0)} in its log")
        if wrong:
            missing = any(w.startswith(("no ", "acknowledged without", "cleared without")) for w in wrong)
            out.append(Finding("alerts", alert_id, "; ".join(wrong), "MISSING" if missing else "MISMATCH"))
    return out


def check_outbox(conn) -> list[Finding]:
    """Each notification sent for an alert has its `sent` step (channel, time) in the log."""
    sent = {
        (a, round(t, 6), note)
        for a, t, note in conn.execute("SELECT alert_id, at_ts, note FROM alert_log WHERE step = 'sent'")
    }
    out = []
    for row_id, alert_id, channel, sent_ts in conn.execute(
        "SELECT id, alert_id, channel, sent_ts FROM outbox WHERE status = 'sent' AND alert_id IS NOT NULL ORDER BY id"
    ):
        if (alert_id, round(sent_ts, 6), channel) not in sent:
            what = f"notification for alert {alert_id} sent on {channel} has no sent step in the alert log"
            out.append(Finding("outbox", row_id, what, "MISSING"))
    return out
