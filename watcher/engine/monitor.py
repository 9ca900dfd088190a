"""Events, observations and alerts for the engine's zones.

Runs inside the writer's transactions, so an alert, its log entry and its outbox messages are
committed together with the readings that caused them, or not at all. Zone rules are judged on
the zone's data time (its newest reading), so durations are right in a replay and with sensor
clocks that lag; data rules (staleness, broker, rejections, delivery, storage) on the service's
own clock, from `tick`, which runs even when no message arrives.
"""

from __future__ import annotations

import logging
import math
from dataclasses import asdict, dataclass, field, replace

from watcher.alerts import messages
from watcher.alerts.channels import route
from watcher.alerts.metrics import metric
from watcher.alerts.policy import LOT_METRICS, WALL_CLOCK_METRICS, AlertState, Rule, acknowledge, evaluate
from watcher.config import Config
from watcher.engine.analysis import CONTEXT_S, analyse, analysis_points, take_snapshot
from watcher.engine.lots import LotKeeper
from watcher.engine.zones import ZoneRunner, spec_key
from watcher.errors import InputError, NotFound
from watcher.ingest.jsondoc import BadJson, load_json, storable
from watcher.lots.events import last_zone
from watcher.ranges import cautious_days
from watcher.store.db import Store

JUMP_REMEMBERED_S = 3600.0
log = logging.getLogger("watcher.alerts")
SERVICE = "service"  # the zone id of service-wide alerts
FORGET_SENSOR_S = 2 * 86400.0  # a sensor silent this long no longer counts for staleness
MAX_NAME = 64
MAX_NOTE = 500


@dataclass
class Live:
    """What a zone's rules need between analyses: switches, receive times, last costs."""

    switches: dict = field(default_factory=dict)  # (signal, sensor) -> [last_ts, value, since_ts]
    received: dict = field(default_factory=dict)  # sensor -> wall time of its newest reading
    figures: dict | None = None
    air_c: float | None = None
    defrosts_today: int | None = None
    event_cost: tuple[float, float] | None = None  # (budget share %, excess um) of the latest costed event
    snapshot_ts: float = -math.inf
    analysed_ts: float = -math.inf

    def switch(self, signal: str, sensor: str, ts: float, value: float) -> None:
        cur = self.switches.get((signal, sensor))
        if cur is not None and ts < cur[0]:
            return  # an older reading; the analysis sorts the record out
        was_on = cur is not None and cur[1] >= 0.5
        since = cur[2] if was_on and value >= 0.5 else ts
        self.switches[(signal, sensor)] = [ts, value, since]

    def on_for(self, signal: str, now_s: float) -> float | None:
        """Seconds the longest-running 'on' switch of this signal has been on; None without sensors."""
        states = [v for (sig, _), v in self.switches.items() if sig == signal]
        if not states:
            return None
        return max((now_s - since for _, value, since in states if value >= 0.5), default=0.0)


def _state_from(d: dict) -> AlertState:
    return AlertState(**{k: v for k, v in d.items() if k in AlertState.__dataclass_fields__})


def _comparable(st: AlertState) -> tuple:
    """The fields worth saving when they change (the observed value changes every batch)."""
    return (
        st.status,
        st.since_s,
        st.raised_s,
        st.notified_s,
        st.escalated,
        st.acked_by,
        st.acked_s,
        st.alert_id,
        st.clearing_since_s,
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


class Monitor:
    def __init__(self, config: Config, store: Store):
        self.config = config
        self.store = store
        self.rules = list(config.alerting.rules)
        ids = {r.id for r in self.rules}
        self.states = {k: _state_from(d) for k, d in store.alerts.states().items() if k[1] in ids}
        self.live = {z.id: Live() for z in config.zones}
        marks = store.zones.marks()
        for zid, lz in self.live.items():
            for sensor, signal, ts, value, since in store.readings.switch_state(zid):
                lz.switches[(signal, sensor)] = [ts, value, since]
            lz.received = store.readings.last_received(zid)
            lz.analysed_ts = marks.get((zid, "analysed_ts"), -math.inf)
            lz.snapshot_ts = marks.get((zid, "snapshot_ts"), -math.inf)
        self.broker_down_since: float | None = None
        self.commit_failing_since: float | None = None
        self.last_jump: tuple[float, float] | None = None  # (seconds, wall time) of the last clock jump
        self.held_count = lambda: 0  # set by the engine: readings waiting for the clocks to agree
        self.lots = LotKeeper(config, store)
        self.fed_of = lambda zone_id: -math.inf  # set by the engine: how far each zone's data go

    # --- intake ---------------------------------------------------------------------------
    def observe(self, reading, received_ts: float) -> None:
        lz = self.live[reading.zone]
        lz.received[reading.sensor] = max(received_ts, lz.received.get(reading.sensor, -math.inf))
        if reading.signal in ("door", "defrost"):
            lz.switch(reading.signal, reading.sensor, reading.ts, reading.value)

    def command(self, payload: bytes, received_s: float, source: str = "mqtt", sender: str | None = None) -> None:
        """Queue an acknowledgement (applied by apply_commands); raises InputError if malformed."""
        alert_id, by, note = parse_ack(payload)
        self.store.commands.add(alert_id, by, note, source, sender, received_s)

    # --- per zone, after each batch that touched it -------------------------------------------
    def zone_step(
        self, runner: ZoneRunner, figures: dict | None, checkpointed: bool, wall_s: float, final: bool = False
    ) -> None:
        zid = runner.zone.id
        lz = self.live[zid]
        if figures is not None:
            lz.figures = figures
        lz.air_c = runner.last_air_c
        if checkpointed and runner.state is not None:
            self._analyse(runner, lz, wall_s, final)
        if runner.last_ts is None:
            return
        rules = [r for r in self.rules if r.metric not in WALL_CLOCK_METRICS + LOT_METRICS]
        self._evaluate(rules, zid, self.zone_observations(runner, lz), runner.last_ts, wall_s)

    def _analyse(self, runner: ZoneRunner, lz: Live, wall_s: float, final: bool = False) -> None:
        """Bring events and costs up to date at the grid points of data time (multiples of
        analyse_every_s) that the zone has passed, so the same readings give the same events
        however they were batched; a final pass (stop, reload, end of a replay) also covers the
        time after the last grid point."""
        zid = runner.zone.id
        snap = take_snapshot(self.store, zid, spec_key(runner.zone), runner.state, lz.snapshot_ts)
        if snap != lz.snapshot_ts:
            lz.snapshot_ts = snap
            self.store.zones.mark_set(zid, "snapshot_ts", snap)
        every, fed = self.config.events.analyse_every_s, runner.fed_ts
        points = analysis_points(lz.analysed_ts, fed, every)
        if final and fed > lz.analysed_ts and (not points or points[-1] < fed):
            points.append(fed)
        for at in points:
            self._analyse_at(runner, lz, at)
            self._lots_at(zid, at, wall_s)

    def _lots_at(self, zone_id: str, at_s: float, wall_s: float) -> None:
        """Bring the zone's lots up to at_s and judge the lot rules on each."""
        rules = [r for r in self.rules if r.metric in LOT_METRICS]
        for lot, _zone, figures in self.lots.advance_zone(zone_id, at_s, self.fed_of, wall_s):
            obs = {
                "lot_budget_used_pct": figures["budget_used_pct"],
                "lot_days_to_limit": cautious_days(figures),
            }
            self._evaluate(rules, f"lot:{lot}", obs, figures["t_s"], wall_s)

    def _analyse_at(self, runner: ZoneRunner, lz: Live, at_s: float) -> None:
        zid = runner.zone.id
        # Re-examine the last two days too: an inferred event's edges move as more data arrive.
        start = lz.analysed_ts - CONTEXT_S if math.isfinite(lz.analysed_ts) else at_s - 400 * 86400.0
        found = analyse(
            self.store,
            runner.zone,
            runner.spec,
            spec_key(runner.zone),
            self.config.site_of(zid).timezone,
            self.config.events,
            start,
            at_s,
        )
        lz.analysed_ts = at_s
        self.store.zones.mark_set(zid, "analysed_ts", at_s)
        lz.defrosts_today = found.defrosts_today
        new = [e for e in found.costed if e["first_cost"]]
        if new:
            lz.event_cost = (max(e["budget_share_pct"] for e in new), max(e["excess_um"] for e in new))

    def forget_after(self, zone_id: str, ts: float) -> None:
        """A late reading at ts changed the zone's past: snapshots from then on no longer hold."""
        self.store.snapshots.drop(zone_id, after_ts=ts)
        self.store.lots.states_drop_after(zone_id, ts)
        lz = self.live[zone_id]
        lz.snapshot_ts = min(lz.snapshot_ts, ts - 1.0)
        lz.analysed_ts = min(lz.analysed_ts, ts - 1.0)

    def zone_observations(self, runner: ZoneRunner, lz: Live) -> dict:
        now = runner.last_ts
        f = lz.figures or {}
        fresh = [v for t, v in runner.air.values() if runner.air and now - t <= runner.max_gap]
        return {
            "budget_used_pct": f.get("budget_used_pct"),
            # Rules on days left judge the cautious end of the range (the rule's label says so).
            "days_to_limit": cautious_days(f),
            "product_c": f.get("product_c"),
            "air_c": runner.last_air_c,
            "door_open_s": lz.on_for("door", now),
            "defrost_s": lz.on_for("defrost", now),
            "defrosts_today": lz.defrosts_today,
            "sensor_spread_k": max(fresh) - min(fresh) if len(fresh) >= 2 else None,
            "event_budget_share_pct": None if lz.event_cost is None else lz.event_cost[0],
            "event_excess_um": None if lz.event_cost is None else lz.event_cost[1],
        }

    # --- on the service's clock ------------------------------------------------------------------
    def tick(self, wall_s: float, broker_connected: bool, commit_ok: bool) -> None:
        """Apply queued acknowledgements; judge the data rules. Call inside a transaction."""
        self.apply_commands(wall_s)
        if broker_connected:
            self.broker_down_since = None
        elif self.broker_down_since is None:
            self.broker_down_since = wall_s
        if commit_ok:
            self.commit_failing_since = None
        elif self.commit_failing_since is None:
            self.commit_failing_since = wall_s
        rules = [r for r in self.rules if r.metric in WALL_CLOCK_METRICS]
        for zid, lz in self.live.items():
            ages = [wall_s - t for t in lz.received.values() if wall_s - t < FORGET_SENSOR_S]
            self._evaluate(rules, zid, {"reading_age_s": max(ages) if ages else None}, wall_s, wall_s)
        failing = self.store.outbox.failing_channels()
        service = {
            "broker_down_s": 0.0 if self.broker_down_since is None else wall_s - self.broker_down_since,
            "commit_failing_s": 0.0 if self.commit_failing_since is None else wall_s - self.commit_failing_since,
            "rejections_per_h": float(self.store.rejections.since(wall_s - 3600.0)),
            "undelivered_s": max((wall_s - t for t in failing.values()), default=0.0),
            "clock_jump_s": self._recent_jump(wall_s),
            "held_readings": float(self.held_count()),
        }
        self._evaluate(rules, SERVICE, service, wall_s, wall_s)

    def clock_jumped(self, jump_s: float, wall_s: float) -> None:
        self.last_jump = (jump_s, wall_s)

    def _recent_jump(self, wall_s: float) -> float:
        """The size of the last clock jump, for an hour after it (then the alert clears)."""
        if self.last_jump is None or not 0.0 <= wall_s - self.last_jump[1] < JUMP_REMEMBERED_S:
            return 0.0
        return abs(self.last_jump[0])

    def record_bypass(self, ep, wall_s: float) -> int | None:
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
            since_s=ep.since_s,
            raised_s=ep.raised_s,
            cleared_s=wall_s,
            value=0.0,
            worst_value=ep.worst_s,
        )
        note = "sent around the database, which could not be written: " + ep.error[:200]
        self.store.alerts.log_add(alert_id, "raise", ep.raised_s, ep.raised_s, ep.worst_s, note=note)
        for at_s, channel, ok, result in ep.sends:
            self.store.alerts.log_add(
                alert_id, "sent" if ok else "send-failed", at_s, at_s, note=f"{channel}: {result}"
            )
        self.store.alerts.log_add(alert_id, "clear", wall_s, wall_s, 0.0)
        log.warning("alert %d recorded after storage came back (readings not stored for %.0f s)", alert_id, ep.worst_s)
        self._notify("clear", {**self.store.alerts.get(alert_id), "op": rule.op}, wall_s)
        return alert_id

    # --- lifecycle ---------------------------------------------------------------------------------
    def _evaluate(self, rules: list[Rule], zone: str, obs: dict, now_s: float, wall_s: float) -> None:
        a = self.config.alerting
        mine = {(zone, r.id): self.states[(zone, r.id)] for r in rules if (zone, r.id) in self.states}
        new, actions = evaluate(rules, zone, obs, now_s, mine, a.repeat_s, a.escalate_s)
        for key, st in new.items():
            old = self.states.get(key)
            if old is None or _comparable(st) != _comparable(old):
                if old is not None or st.status != "quiet":
                    self.store.alerts.state_save(*key, asdict(st))
            self.states[key] = st
        by_id = {r.id: r for r in rules}
        for act in actions:
            self._act(act, by_id[act.rule], obs, wall_s)

    def _act(self, act, rule: Rule, obs: dict, wall_s: float) -> None:
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
                since_s=act.at_s - act.value if metric(rule.metric).unit == "duration" else st.since_s,
                raised_s=act.at_s,
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
        worst = alert["worst_value"] if alert["worst_value"] is not None else act.value
        worst = max(worst, act.value) if rule.op == ">=" else min(worst, act.value)
        fields = {"value": act.value, "worst_value": worst}
        n = 0
        if act.kind == "repeat":
            n = alert["repeats"] + 1
            fields["repeats"] = n
        elif act.kind == "escalate":
            fields["escalated_s"] = act.at_s
        elif act.kind == "clear":
            fields.update(status="cleared", cleared_s=act.at_s)
            log.info("alert %d cleared: zone %s, %s", alert_id, act.zone, rule.label)
        self.store.alerts.update(alert_id, **fields)
        self.store.alerts.log_add(alert_id, act.kind, act.at_s, wall_s, act.value)
        self._notify(act.kind, {**alert, **fields, "op": rule.op}, wall_s, n)

    def _cleared_id(self, key) -> int | None:
        """The alert id a clear refers to (the policy has already reset the state)."""
        return self.store.alerts.open_id(*key)

    def _notify(self, kind: str, alert: dict, wall_s: float, n: int = 0, by=None, note=None) -> None:
        key = alert["zone"]
        lot = key[4:] if key.startswith("lot:") else None
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
            events = self.store.events.of_zone(zone.id, (lz.figures or {}).get("model_time_s", wall_s) - 86400.0)
        if lot is not None:
            zone_name, place = f"lot {lot} ({zone_name})", f"{place}, lot {lot}"
            state = self.store.lots.state_get(lot)
            figures = {**(state[2] if state else {}), "air_c": lz.air_c if lz else None}
        tags = ["escalation"] if kind == "escalate" else ["alerts", alert["severity"], f"zone:{key}"]
        exclude = set(self.store.outbox.failing_channels()) if alert["metric"] == "undelivered_s" else set()
        self.store.outbox.add(
            messages.title(kind, alert, zone_name, n),
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
            ),
            tags,
            wall_s,
            route(list(self.config.channels), tags, exclude),
            dedupe=f"alert:{alert['id']}:{kind}:{n}",
            alert_id=alert["id"],
        )

    # --- acknowledgements --------------------------------------------------------------------------
    def apply_commands(self, wall_s: float) -> None:
        for cmd_id, alert_id, by, note, source, sender in self.store.commands.pending():
            self.store.commands.done(cmd_id, wall_s, self._ack(alert_id, by, note, source, sender, wall_s))

    def _ack(self, alert_id: int, by: str, note, source: str, sender, wall_s: float) -> str:
        alert = self.store.alerts.get(alert_id)
        if alert is None:
            return f"refused: no alert {alert_id}"
        if alert["status"] != "open":
            return f"refused: alert {alert_id} is {alert['status']}"
        key = (alert["zone"], alert["rule"])
        try:
            self.states = acknowledge(self.states, *key, by, wall_s)
        except NotFound:
            return f"refused: alert {alert_id} is not open in the running service"
        self.store.alerts.state_save(*key, asdict(self.states[key]))
        self.store.alerts.update(alert_id, status="acknowledged", acked_s=wall_s, acked_by=by, ack_note=note)
        via = f"via {source}" + (f" from {sender}" if sender else "")
        self.store.alerts.log_add(alert_id, "ack", wall_s, wall_s, None, by, f"{via}: {note}" if note else via)
        log.info("alert %d acknowledged by %s (%s)", alert_id, by, via)
        self._notify("ack", {**alert, "acked_s": wall_s}, wall_s, by=by, note=note)
        return "acknowledged"
