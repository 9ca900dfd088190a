"""The alert lifecycle for the engine: rules judged on observations (alerts.policy), each
step (raise, repeat, escalate, acknowledge, clear) stored with its chained log entry and its
outbox messages in the writer's transaction, so they commit with the readings that caused them.
"""

from __future__ import annotations

import logging
from contextlib import contextmanager
from dataclasses import asdict, replace

from watcher.alerts import messages
from watcher.alerts.channels import route
from watcher.alerts.metrics import metric
from watcher.alerts.policy import SEVERITIES, AlertState, Rule, acknowledge, evaluate
from watcher.config import Config
from watcher.engine.live import Live
from watcher.errors import InputError, NotFound
from watcher.ingest.jsondoc import BadJson, load_json, storable
from watcher.lots.events import last_zone
from watcher.store import subjects
from watcher.store.db import Store

log = logging.getLogger("watcher.alerts")
SERVICE = subjects.SERVICE.key  # the subject key of service-wide alerts
MAX_NAME = 64
MAX_NOTE = 500
_QUIET = AlertState("", "")


def _state_from(d: dict) -> AlertState:
    return AlertState(**{k: v for k, v in d.items() if k in AlertState.__dataclass_fields__})


def _comparable(st: AlertState) -> tuple:
    """The fields worth saving when they change (the observed value changes every batch)."""
    return (
        st.status,
        st.since_ts,
        st.raised_ts,
        st.notified_ts,
        st.escalated,
        st.acked_by,
        st.acked_ts,
        st.alert_id,
        st.clearing_since_ts,
    )


def parse_ack(payload: bytes) -> tuple[int, str, str | None]:
    """An acknowledgement command: {"alert": 12, "by": "name", "note": "optional"}."""
    try:
        data = load_json(payload)
    except BadJson as exc:
        raise InputError("ack command", payload[:80], f'JSON like {{"alert": 12, "by": "name"}} ({exc})') from None
    if not isinstance(data, dict):
        raise InputError("ack command", data, "a JSON object")
    alert, by, note = data.get("alert"), data.get("by"), data.get("note")
    if not isinstance(alert, int) or isinstance(alert, bool) or not 1 <= alert < 2**63:
        raise InputError("ack command: alert", alert, "a positive alert id")
    if not isinstance(by, str) or not by.strip() or len(by) > MAX_NAME or not storable(by):
        raise InputError("ack command: by", by, f"the name of who acknowledges (1-{MAX_NAME} characters)")
    if note is not None and (not isinstance(note, str) or len(note) > MAX_NOTE or not storable(note)):
        raise InputError("ack command: note", note, f"text of at most {MAX_NOTE} characters")
    return alert, by.strip(), note


class AlertKeeper:
    def __init__(self, config: Config, store: Store, live: dict[str, Live]):
        self.config, self.store, self.live = config, store, live
        self.rules = list(config.alerting.rules)
        ids = {r.id for r in self.rules}
        self.states = {k: _state_from(d) for k, d in store.alerts.states().items() if k[1] in ids}
        self._gathered: dict[int, list] | None = None

    def open_by_severity(self) -> dict[str, int]:
        """How many alerts are raised and not yet cleared, by severity (every severity listed)."""
        severity = {r.id: r.severity for r in self.rules}
        out = dict.fromkeys(SEVERITIES, 0)
        for (_, rule), st in self.states.items():
            if st.status in ("open", "acknowledged") and rule in severity:
                out[severity[rule]] += 1
        return out

    @contextmanager
    def gathered(self, wall_ts: float):
        """Hold the notices of every step judged inside, then send one per alert: a backlog
        stepped through in one go tells each alert once, with what became of it (see _send)."""
        self._gathered = {}
        try:
            yield
        except BaseException:
            self._gathered = None
            raise
        gathered, self._gathered = self._gathered, None
        for steps in gathered.values():
            self._send(steps, wall_ts)

    def evaluate(
        self, rules: list[Rule], zone: str, obs: dict, now_ts: float, wall_ts: float, skip_idle: bool = False
    ) -> None:
        """Judge the rules on one observation at now_ts (data time; wall_ts is the service's
        clock). skip_idle: skip it when nothing can change (every rule quiet and none holding),
        which keeps minute steps through a long backlog cheap."""
        if not rules:
            return
        if skip_idle and all(self.states.get((zone, r.id), _QUIET).status == "quiet" for r in rules):
            # Every rule quiet and none holds: the policy would change nothing (the usual step).
            if not any(obs.get(r.metric) is not None and r.applies_to(zone) and r.holds(obs[r.metric]) for r in rules):
                return
        a = self.config.alerting
        mine = {(zone, r.id): self.states[(zone, r.id)] for r in rules if (zone, r.id) in self.states}
        new, actions = evaluate(rules, zone, obs, now_ts, mine, a.repeat_s, a.escalate_s)
        for key, st in new.items():
            old = self.states.get(key)
            if old is None or _comparable(st) != _comparable(old):
                if old is not None or st.status != "quiet":
                    self.store.alerts.state_save(*key, asdict(st))
            self.states[key] = st
        by_id = {r.id: r for r in rules}
        for act in actions:
            self._act(act, by_id[act.rule], obs, wall_ts)

    def _act(self, act, rule: Rule, obs: dict, wall_ts: float) -> None:
        key = (act.zone, act.rule)
        st = self.states[key]
        if act.kind == "raise":
            alert_id = self.store.alerts.add(
                zone=act.zone,
                rule=rule.id,
                severity=rule.severity,
                label=rule.label,
                metric=rule.metric,
                threshold=rule.threshold,
                status="open",
                # For a duration, the condition began `value` seconds ago (the door opened then).
                since_ts=act.at_ts - act.value if metric(rule.metric).unit == "duration" else st.since_ts,
                raised_ts=act.at_ts,
                value=act.value,
                worst_value=act.value,
            )
            st = replace(st, alert_id=alert_id)
            self.states[key] = st
            self.store.alerts.state_save(*key, asdict(st))
            log.warning("alert %d raised: zone %s, %s (%s)", alert_id, act.zone, rule.label, act.value)
        alert_id = st.alert_id if act.kind != "clear" else self._cleared_id(key)
        if alert_id is None:
            return
        alert = self.store.alerts.get(alert_id)
        worst = next(v for v in (alert["worst_value"], act.worst, act.value) if v is not None)
        for v in (act.worst, act.value):
            if v is not None:
                worst = max(worst, v) if rule.op == ">=" else min(worst, v)
        fields = {"value": act.value, "worst_value": worst}
        n = 0
        if act.kind == "repeat":
            n = alert["repeats"] + 1
            fields["repeats"] = n
        elif act.kind == "escalate":
            fields["escalated_ts"] = act.at_ts
        elif act.kind == "clear":
            fields.update(status="cleared", cleared_ts=act.at_ts)
            log.info("alert %d cleared: zone %s, %s", alert_id, act.zone, rule.label)
        self.store.alerts.update(alert_id, **fields)
        which = obs.get(f"{rule.metric}:which") if act.kind != "clear" else None  # e.g. the silent sensor
        note = f"sensor {which}" if which else None
        self.store.alerts.log_add(alert_id, act.kind, act.at_ts, wall_ts, act.value, note=note)
        fired = next((step[3] for step in self.store.alerts.log(alert_id) if step[0] == "raise"), act.value)
        told = {**alert, **fields, "op": rule.op, "which": note, "fired_value": fired}
        if self._gathered is None:
            self._notify(act.kind, told, wall_ts, n)
        else:
            self._gathered.setdefault(alert_id, []).append((act.kind, told, n))

    def _send(self, steps: list[tuple[str, dict, int]], wall_ts: float) -> None:
        """One notice for what one judgement learnt of an alert: raised and cleared already
        (learnt late), "over"; raised (escalated too when it was open long enough), the raise;
        otherwise the clear, the escalation or the last reminder."""
        kinds = [kind for kind, _, _ in steps]
        alert = {**steps[-1][1], "learnt_ts": wall_ts}
        if "raise" in kinds:
            if "clear" in kinds:
                self._notify("over", alert, wall_ts)
            else:
                self._notify("raise", alert, wall_ts, escalated="escalate" in kinds)
            return
        for kind in ("clear", "escalate", "repeat"):
            if kind in kinds:
                n = max(n for k, _, n in steps if k == kind)
                self._notify(kind, alert, wall_ts, n)
                return

    def _cleared_id(self, key) -> int | None:
        """The alert id a clear refers to (the policy has already reset the state)."""
        return self.store.alerts.open_id(*key)

    def _notify(
        self, kind: str, alert: dict, wall_ts: float, n: int = 0, by=None, note=None, escalated: bool = False
    ) -> None:
        key = alert["zone"]
        subject = subjects.Subject.of(key)
        lot = subject.id if subject.kind == "lot" else None
        if lot is not None:  # a lot's alert: told where the lot is, with the lot's own figures
            key = last_zone(self.store.lots.history(lot)) or key
        zone = self.config.zone(key)
        zone_name = zone.name if zone else "watcher service"
        site = self.config.site_of(key) if zone else (self.config.sites[0] if self.config.sites else None)
        tz = site.timezone if site else "UTC"
        place = f"{site.name or site.id} - {zone_name}" if site else zone_name
        lz = self.live.get(key)
        figures = {**(lz.figures or {}), "air_c": lz.air_c} if lz else None
        events = []
        if zone is not None and lz is not None:
            events = self.store.events.of_zone(zone.id, (lz.figures or {}).get("model_time_ts", wall_ts) - 86400.0)
        if lot is not None:
            zone_name, place = f"lot {lot} ({zone_name})", f"{place}, lot {lot}"
            state = self.store.lots.state_get(lot)
            figures = {**(state[2] if state else {}), "air_c": lz.air_c if lz else None}
        tags = ["escalation"] if kind == "escalate" else ["alerts", alert["severity"], f"zone:{key}"]
        if kind != "escalate" and zone is not None and site is not None:
            tags.append(f"site:{site.id}")  # a central watcher routes each site's alerts to its own people
        if escalated:  # learnt late and open past the escalation time: the escalation contacts too
            tags.append("escalation")
        exclude = set(self.store.outbox.failing_channels()) if alert["metric"] == "undelivered_s" else set()
        self.store.outbox.add(
            messages.title(kind, alert, zone_name, n, (site.name or site.id) if site else ""),
            messages.body(
                kind,
                alert,
                place,
                tz,
                figures,
                events,
                self.config.broker.ack_topic,
                zone.profile.limit_mean_diameter_um if zone else None,
                by,
                note,
                site.temp_unit if site else "C",
            ),
            tags,
            wall_ts,
            route(list(self.config.channels), tags, exclude),
            dedupe=f"alert:{alert['id']}:{kind}:{n}",
            alert_id=alert["id"],
            level=messages.level(kind, alert["severity"]),
        )

    def apply_commands(self, wall_ts: float) -> None:
        for cmd_id, alert_id, by, note, source, sender in self.store.commands.pending():
            self.store.commands.done(cmd_id, wall_ts, self._ack(alert_id, by, note, source, sender, wall_ts))

    def _ack(self, alert_id: int, by: str, note, source: str, sender, wall_ts: float) -> str:
        alert = self.store.alerts.get(alert_id)
        if alert is None:
            return f"refused: no alert {alert_id}"
        if alert["status"] != "open":
            return f"refused: alert {alert_id} is {alert['status']}"
        key = (alert["zone"], alert["rule"])
        try:
            self.states = acknowledge(self.states, *key, by, wall_ts)
        except NotFound:
            return f"refused: alert {alert_id} is not open in the running service"
        self.store.alerts.state_save(*key, asdict(self.states[key]))
        self.store.alerts.update(alert_id, status="acknowledged", acked_ts=wall_ts, acked_by=by, ack_note=note)
        via = f"via {source}" + (f" from {sender}" if sender else "")
        self.store.alerts.log_add(alert_id, "ack", wall_ts, wall_ts, None, by, f"{via}: {note}" if note else via)
        log.info("alert %d acknowledged by %s (%s)", alert_id, by, via)
        self._notify("ack", {**alert, "acked_ts": wall_ts}, wall_ts, by=by, note=note)
        return "acknowledged"

    def record_bypass(self, ep, wall_ts: float) -> int | None:
        """Record a storage episode whose alert went out around the database (alerts.bypass):
        raised, each send, cleared; the clear notice goes through the outbox as usual."""
        rule = next((r for r in self.rules if r.metric == "commit_failing_s"), None)
        if rule is None:
            return None
        fields = dict(zone=SERVICE, rule=rule.id, severity=rule.severity, label=rule.label, metric=rule.metric)
        alert_id = self.store.alerts.add(
            **fields,
            threshold=rule.threshold,
            status="cleared",
            since_ts=ep.since_ts,
            raised_ts=ep.raised_ts,
            cleared_ts=wall_ts,
            value=0.0,
            worst_value=ep.worst_s,
        )
        note = "sent around the database, which could not be written: " + ep.error[:200]
        self.store.alerts.log_add(alert_id, "raise", ep.raised_ts, ep.raised_ts, ep.worst_s, note=note)
        for at_ts, channel, ok, result in ep.sends:
            self.store.alerts.log_add(
                alert_id, "sent" if ok else "send-failed", at_ts, at_ts, note=f"{channel}: {result}"
            )
        self.store.alerts.log_add(alert_id, "clear", wall_ts, wall_ts, 0.0)
        log.warning("alert %d recorded after storage came back (readings not stored for %.0f s)", alert_id, ep.worst_s)
        self._notify("clear", {**self.store.alerts.get(alert_id), "op": rule.op}, wall_ts)
        return alert_id
