"""Events, observations and alerts for the engine's zones: the engine calls this after each
batch and on every tick; the work is done by the parts it wires together.

- live.py: what the zone rules need between judgements; timeline.py: the data times they are
  judged at, and what they see there;
- analysis.py: events and their costs, daily growth, snapshots, at grid points of data time;
- engine/lots.py: each lot brought up to date with its zones;
- alert_keeper.py: rules judged, alert steps stored and sent.

Runs inside the writer's transactions, so an alert, its log entry and its outbox messages are
committed together with the readings that caused them, or not at all. Zone rules are judged on
data time, step by step through whatever a batch brought (timeline.py), so durations are right
in a replay, with sensor clocks that lag and for a backlog that arrives at once; data rules
(staleness, broker, rejections, delivery, storage) on the service's own clock, from `tick`,
which runs even when no message arrives.
"""

from __future__ import annotations

import math
from collections.abc import Callable

from watcher.alerts.metrics import FROM_EVENTS, FROM_MODEL, FROM_READINGS
from watcher.alerts.policy import LOT_METRICS, WALL_CLOCK_METRICS
from watcher.config import Config
from watcher.engine.alert_keeper import SERVICE, AlertKeeper, parse_ack
from watcher.engine.analysis import CONTEXT_S, analyse, analysis_points, take_snapshot
from watcher.engine.live import Live, load_live, stalest
from watcher.engine.lots import LotKeeper
from watcher.engine.timeline import model_steps, reading_steps
from watcher.engine.zones import ZoneRunner, spec_key
from watcher.ingest.payload import TEMPERATURE_SIGNALS
from watcher.ranges import cautious_days
from watcher.store import subjects
from watcher.store.db import Store

JUMP_REMEMBERED_S = 3600.0
FORGET_SENSOR_S = 2 * 86400.0  # a sensor silent this long no longer counts for staleness
STEPPED_SIGNALS = ("air_c", "door", "defrost")  # the readings the reading rules see


class Monitor:
    def __init__(
        self,
        config: Config,
        store: Store,
        runners: dict[str, ZoneRunner] | None = None,
        held_count: Callable[[], int] = lambda: 0,
        last_jump: tuple[float, float] | None = None,
    ):
        """runners: the engine's zone runners (how far each zone's data go); held_count:
        readings waiting for the clocks to agree; last_jump: (seconds, wall time) of the last
        clock jump, which is not in the record and is carried across reloads."""
        self.config = config
        self.store = store
        self.runners = {} if runners is None else runners
        self.held_count, self.last_jump = held_count, last_jump
        self.rules = list(config.alerting.rules)
        self.by_source = {
            src: [r for r in self.rules if r.metric in names]
            for src, names in (("readings", FROM_READINGS), ("model", FROM_MODEL), ("events", FROM_EVENTS))
        }
        self.live = load_live(store, (z.id for z in config.zones))
        for zid, lz in self.live.items():  # a zone without marks: judged up to what it has
            runner = self.runners.get(zid)
            if runner is not None:
                lz.air = {sensor: (ts, value) for sensor, (ts, value) in runner.air.items()}
                if not math.isfinite(lz.judged_ts) and runner.last_ts is not None:
                    lz.judged_ts = runner.last_ts
                if not math.isfinite(lz.model_judged_ts):
                    lz.model_judged_ts = runner.keep_after_ts
        self.alerts = AlertKeeper(config, store, self.live)
        self.lots = LotKeeper(config, store)
        self._marks: dict[tuple[str, str], float] = {}  # judged marks as last written
        self.broker_down_since: float | None = None
        self.commit_failing_since: float | None = None

    # --- intake ---------------------------------------------------------------------------
    def observe(self, reading, received_ts: float) -> None:
        lz = self.live[reading.zone]
        if reading.signal in TEMPERATURE_SIGNALS:  # door and defrost report on change: never stale
            key = (reading.sensor, reading.signal)
            lz.received[key] = max(received_ts, lz.received.get(key, -math.inf))
        if reading.signal in STEPPED_SIGNALS:
            lz.inbox.append((reading.ts, reading.sensor, reading.signal, reading.value))

    def fed_of(self, zone_id: str) -> float:
        """How far the zone's model has been fed (data time)."""
        runner = self.runners.get(zone_id)
        return -math.inf if runner is None else runner.fed_ts

    def command(self, payload: bytes, received_ts: float, source: str = "mqtt", sender: str | None = None) -> None:
        """Queue an acknowledgement (applied by apply_commands); raises InputError if malformed."""
        alert_id, by, note = parse_ack(payload)
        self.store.commands.add(alert_id, by, note, source, sender, received_ts)

    def apply_commands(self, wall_ts: float) -> None:
        self.alerts.apply_commands(wall_ts)

    def record_bypass(self, ep, wall_ts: float) -> int | None:
        return self.alerts.record_bypass(ep, wall_ts)

    # --- per zone, after each batch that touched it -------------------------------------------
    def zone_step(
        self, runner: ZoneRunner, figures: dict | None, checkpointed: bool, wall_ts: float, final: bool = False
    ) -> None:
        zid = runner.zone.id
        lz = self.live[zid]
        if figures is not None:
            lz.figures = figures
        lz.air_c = runner.last_air_c
        with self.alerts.gathered(wall_ts):  # what one step learnt goes out as one message per alert
            if runner.last_ts is not None:
                for at, obs in reading_steps(lz, runner.last_ts, self.config.ingest.max_gap_s):
                    self.alerts.evaluate(self.by_source["readings"], zid, obs, at, wall_ts, skip_idle=True)
            for at, obs in model_steps(lz, runner.take_steps()):
                self.alerts.evaluate(self.by_source["model"], zid, obs, at, wall_ts, skip_idle=True)
            if checkpointed and runner.state is not None:
                self._analyse(runner, lz, wall_ts, final)
        if checkpointed:  # with the zone's checkpoint: a restart resumes judging from there
            self._mark(zid, "judged_ts", lz.judged_ts)
            self._mark(zid, "model_judged_ts", lz.model_judged_ts)

    def _mark(self, zone_id: str, name: str, value: float) -> None:
        if math.isfinite(value) and self._marks.get((zone_id, name)) != value:
            self.store.zones.mark_set(zone_id, name, value)
            self._marks[(zone_id, name)] = value

    def _analyse(self, runner: ZoneRunner, lz: Live, wall_ts: float, final: bool = False) -> None:
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
            obs = {
                "defrosts_today": lz.defrosts_today,
                "event_budget_share_pct": None if lz.event_cost is None else lz.event_cost[0],
                "event_excess_um": None if lz.event_cost is None else lz.event_cost[1],
            }
            self.alerts.evaluate(self.by_source["events"], zid, obs, at, wall_ts)
            self._lots_at(zid, at, wall_ts)

    def _lots_at(self, zone_id: str, at_ts: float, wall_ts: float) -> None:
        """Bring the zone's lots up to at_ts and judge the lot rules on each."""
        rules = [r for r in self.rules if r.metric in LOT_METRICS]
        for lot, _zone, figures in self.lots.advance_zone(zone_id, at_ts, self.fed_of, wall_ts):
            obs = {
                "lot_budget_used_pct": figures["budget_used_pct"],
                "lot_days_to_limit": cautious_days(figures),
            }
            self.alerts.evaluate(rules, subjects.lot(lot).key, obs, figures["time_ts"], wall_ts)

    def _analyse_at(self, runner: ZoneRunner, lz: Live, at_ts: float) -> None:
        zid = runner.zone.id
        # Re-examine the last two days too: an inferred event's edges move as more data arrive.
        start = lz.analysed_ts - CONTEXT_S if math.isfinite(lz.analysed_ts) else at_ts - 400 * 86400.0
        found = analyse(
            self.store,
            runner.zone,
            runner.spec,
            spec_key(runner.zone),
            self.config.site_of(zid).timezone,
            self.config.events,
            start,
            at_ts,
            lz.baseline,
        )
        lz.analysed_ts = at_ts
        self.store.zones.mark_set(zid, "analysed_ts", at_ts)
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

    # --- on the service's clock ------------------------------------------------------------------
    def tick(self, wall_ts: float, broker_connected: bool, commit_ok: bool) -> None:
        """Apply queued acknowledgements; judge the data rules. Call inside a transaction."""
        self.apply_commands(wall_ts)
        if broker_connected:
            self.broker_down_since = None
        elif self.broker_down_since is None:
            self.broker_down_since = wall_ts
        if commit_ok:
            self.commit_failing_since = None
        elif self.commit_failing_since is None:
            self.commit_failing_since = wall_ts
        rules = [r for r in self.rules if r.metric in WALL_CLOCK_METRICS]
        for zid, lz in self.live.items():
            age, which = stalest(lz.received, wall_ts, FORGET_SENSOR_S)
            self.alerts.evaluate(rules, zid, {"reading_age_s": age, "reading_age_s:which": which}, wall_ts, wall_ts)
        failing = self.store.outbox.failing_channels()
        service = {
            "broker_down_s": 0.0 if self.broker_down_since is None else wall_ts - self.broker_down_since,
            "commit_failing_s": 0.0 if self.commit_failing_since is None else wall_ts - self.commit_failing_since,
            "rejections_per_h": float(self.store.rejections.since(wall_ts - 3600.0)),
            "undelivered_s": max((wall_ts - t for t in failing.values()), default=0.0),
            "clock_jump_s": self._recent_jump(wall_ts),
            "held_readings": float(self.held_count()),
        }
        self.alerts.evaluate(rules, SERVICE, service, wall_ts, wall_ts)

    def clock_jumped(self, jump_s: float, wall_ts: float) -> None:
        self.last_jump = (jump_s, wall_ts)

    def _recent_jump(self, wall_ts: float) -> float:
        """The size of the last clock jump, for an hour after it (then the alert clears)."""
        if self.last_jump is None or not 0.0 <= wall_ts - self.last_jump[1] < JUMP_REMEMBERED_S:
            return 0.0
        return abs(self.last_jump[0])
