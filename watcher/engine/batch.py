"""The batch step of the service: messages in, one committed transaction out.

``Engine.process`` parses, deduplicates, stores and feeds a batch of messages inside one
SQLite transaction. Only after it returns may the caller acknowledge the messages. If the
commit fails, the touched zones are reloaded from the database, so memory never runs ahead of
the record; the caller keeps the batch and tries again.
"""

from __future__ import annotations

import logging
import math
import os
import time
from collections import Counter
from contextlib import contextmanager
from dataclasses import dataclass, field

from watcher.config import Config
from watcher.engine.lots import parse_payload, record_event
from watcher.engine.monitor import Monitor
from watcher.engine.rejects import Excess, RejectionLimiter
from watcher.engine.route import birth_filters, is_birth, is_command, readings_of
from watcher.engine.zones import ZoneRunner, spec_key
from watcher.errors import InputError
from watcher.ingest import sparkplug
from watcher.ingest.message import Message
from watcher.ingest.payload import OutOfClock, Reading, Rejected
from watcher.ingest.topics import topic_is_clean
from watcher.store.db import Store
from watcher.store.zones import ZoneRow

log = logging.getLogger("watcher.engine")
# Fault injection for the tests of the writer's isolation (never set in production): a message
# whose payload contains the marker makes the handler raise, or ends the process at once as a
# crash would. Read once at import.
_RAISE_ON = os.environ.get("WATCHER_TEST_RAISE_ON", "").encode() or None
_CRASH_ON = os.environ.get("WATCHER_TEST_CRASH_ON", "").encode() or None
FEED_AT_PENDING = 5000  # readings waiting in a zone before it is fed between checkpoints
CLOCK_TRUST_S = 86400.0  # retention believes the clock only this far past the newest reading


@dataclass
class BatchResult:
    counts: Counter = field(default_factory=Counter)
    rejections: Counter = field(default_factory=Counter)
    recomputed: set = field(default_factory=set)
    late_from: dict = field(default_factory=dict)  # zone -> earliest late reading time


def reason_class(reason: str) -> str:
    """A bounded label for metrics: the reason's first words, without values."""
    for key in (
        "no source",
        "unknown zone",
        "payload of",
        "not UTF-8",
        "invalid JSON",
        "too large",
        "digits",
        "surrogate",
        "nested",
        "missing field",
        "is not a number",
        "not finite",
        "outside the plausible",
        "in the future",
        "in the past",
        "timestamp",
        "state",
        "value is",
        "retained",
        "already has",
    ):
        if key in reason:
            return key.replace(" ", "_")
    return "other"


class Engine:
    def __init__(self, config: Config, store: Store, checkpoint_s: float = 10.0):
        self.config = config
        self.store = store
        self.checkpoint_s = checkpoint_s
        self.runners: dict[str, ZoneRunner] = {}
        self._last_checkpoint: dict[str, float] = {}
        self._checkpointed: dict[str, int] = {}  # readings_total at each zone's last checkpoint
        self.last_figures: dict[str, dict] = {}
        self._load(z.id for z in config.zones)
        self.monitor = self._monitor()
        self.held_count = store.record.count("held")
        self.limiter = RejectionLimiter(config.ingest.rejections_per_topic_per_min)
        # Sparkplug aliases as the last births said (kept in the store with the batch).
        self.aliases = sparkplug.AliasBook(store.aliases.all())
        self.birth_filters = birth_filters(config)

    def _monitor(self) -> Monitor:
        old = getattr(self, "monitor", None)
        last_jump = old.last_jump if old is not None else None  # not in the record; kept across reloads
        return Monitor(self.config, self.store, self.runners, lambda: self.held_count, last_jump)

    def reload_all(self) -> None:
        """After a failed outer transaction: every zone and the monitor back to the record."""
        self.store.readings.forget_heads()
        self._load(self.runners)
        self.monitor = self._monitor()

    # --- loading -------------------------------------------------------------------------
    def _new_runner(self, zone_id: str) -> ZoneRunner:
        z = self.config.zone(zone_id)
        return ZoneRunner(z, self.config.ingest.reorder_window_s, self.config.ingest.max_gap_s)

    def _load(self, zone_ids) -> None:
        rows, marks = self.store.zones.rows(), self.store.zones.marks()
        for zid in zone_ids:
            runner = self._new_runner(zid)
            row = rows.get(zid)
            same = row is not None and row.spec_key == spec_key(runner.zone)
            if same:
                runner.restore(row.fed_ts, row.state, row.sensors)
            elif row is not None:
                log.info("zone %s: settings changed since the last checkpoint, recomputing from stored readings", zid)
            # The model rules were judged up to their mark; what is fed beyond it is judged next.
            runner.keep_after_ts = marks.get((zid, "model_judged_ts"), runner.fed_ts)
            after = row.fed_ts if same else None
            self._replay_into(runner, after)
            runner.sensor_names = self.store.readings.sensors(zid)
            runner.heard_wall_ts = time.time()  # a restart is no silence: a backlog may be on its way
            self.runners[zid] = runner

    def _replay_into(self, runner: ZoneRunner, after_ts: float | None) -> None:
        """Feed a zone's stored model readings newer than after_ts (all when None)."""
        for sensor, signal, ts, value in self.store.readings.of_zone(runner.zone.id, after_ts):
            runner.accept(Reading(runner.zone.id, sensor, signal, ts, value))
        total, last = self.store.readings.summary(runner.zone.id)
        runner.readings_total, runner.last_ts = total, last
        runner.advance()
        for start, end in runner.new_gaps:  # most are stored already; the rest were pending
            self.store.gaps.add(runner.zone.id, start, end)
        runner.new_gaps.clear()

    def _from_anchor(self, zone_id: str) -> tuple[ZoneRunner, float | None]:
        """A runner at the zone's retention anchor (the exact state at the last downsampling
        cut-off), or a fresh one when the zone has none."""
        runner = self._new_runner(zone_id)
        anchor = self.store.zones.anchor(zone_id)
        if anchor is None:
            return runner, None
        key, fed_ts, state, sensors = anchor
        if key != spec_key(runner.zone):
            log.warning(
                "zone %s: settings changed since raw readings were downsampled; recomputing from the "
                "remaining raw readings only",
                zone_id,
            )
            return runner, None
        runner.restore(fed_ts, state, sensors)
        return runner, fed_ts

    def recompute(self, zone_id: str, keep_after_ts: float = math.inf) -> ZoneRunner:
        """Rebuild one zone from its anchor and every raw reading stored after it (the model
        steps after keep_after_ts kept for the rules: by default none)."""
        runner, after = self._from_anchor(zone_id)
        runner.keep_after_ts = keep_after_ts
        runner.sensor_names = self.store.readings.sensors(zone_id)
        for sensor, signal, ts, value in self.store.readings.of_zone(zone_id, after):
            runner.accept(Reading(zone_id, sensor, signal, ts, value))
        total, last = self.store.readings.summary(zone_id)
        runner.readings_total, runner.last_ts = total, last
        runner.advance()
        return runner

    # --- routing -------------------------------------------------------------------------
    def parse(self, msg: Message) -> list[Reading]:
        readings = readings_of(self.config, msg, self.runners.__contains__, self.aliases)
        first = readings[0]  # one source, one topic: one zone and sensor
        runner = self.runners[first.zone]
        if first.sensor not in runner.sensor_names:
            cap = self.config.ingest.max_sensors_per_zone
            if len(runner.sensor_names) >= cap:
                raise Rejected(
                    f"sensor {first.sensor[:64]!r}: zone {first.zone} already has {cap} sensors "
                    "(ingest.max_sensors_per_zone; raise it if these sensors are real)"
                )
            runner.sensor_names.add(first.sensor)
        return readings

    # --- the batch -----------------------------------------------------------------------
    def process(self, messages: list[Message], now: float | None = None) -> BatchResult:
        """Store and feed a batch in one transaction; raise if the commit fails."""
        now = time.time() if now is None else now
        if _RAISE_ON or _CRASH_ON:
            _inject(messages)
        result = BatchResult()
        parsed: list[tuple[list[Reading] | str | tuple | None, Message]] = []
        births: list[tuple[str, dict[int, str]]] = []
        for msg in messages:
            if is_command(self.config, msg.topic):
                parsed.append((None, msg))
                continue
            if self.birth_filters and is_birth(self.config, msg.topic, self.birth_filters):
                try:
                    births.append(self.aliases.learn(msg.topic, sparkplug.decode(msg.payload)))
                    result.counts["sparkplug_birth"] += 1
                except Rejected as exc:
                    parsed.append((f"Sparkplug birth: {exc}", msg))
                    result.rejections["sparkplug_birth"] += 1
                    result.counts["rejected"] += 1
                continue
            try:
                parsed.append((self.parse(msg), msg))
            except OutOfClock as exc:
                if self.held_count < self.config.ingest.hold_max:
                    parsed.append((("hold", str(exc)), msg))
                    self.held_count += 1
                    result.counts["held"] += 1
                    continue
                reason = f"{exc} (not held: {self.held_count} readings already wait for the clocks to agree)"
                parsed.append((reason, msg))
                result.rejections[reason_class(reason)] += 1
                result.counts["rejected"] += 1
            except Rejected as exc:
                parsed.append((str(exc), msg))
                result.rejections[reason_class(str(exc))] += 1
                result.counts["rejected"] += 1
        touched: set[str] = set()
        excess: dict[str, Excess] = {}
        with self._transaction(touched):
            for key, names in births:  # kept, so alias-only data are read after a restart
                self.store.aliases.replace(key, names)
            for item, msg in parsed:
                if item is None:
                    self._command(msg, result, excess)
                elif isinstance(item, str):
                    self._reject(msg, item, excess)
                elif isinstance(item, tuple):
                    self.store.held.add(msg.received_ts, msg.topic, msg.payload, item[1])
            for topic, ex in excess.items():
                self.store.rejections.add(ex.first_ts, topic, self.limiter.summary(ex), ex.payload, n=ex.n)
            good = [(r, msg.received_ts, msg.topic) for item, msg in parsed if isinstance(item, list) for r in item]
            ignored = sum(item.ignored for item, _, _ in good)
            if ignored:  # a SenML pack's other records: not taken, and counted
                result.counts["records_ignored"] += ignored
            self._store_readings(good, result, touched)
            self._finish(touched, result, now)
        return result

    @contextmanager
    def _transaction(self, touched: set[str]):
        """One SQLite transaction; if it fails, memory must not run ahead of the record."""
        try:
            with self.store.atomic():
                yield
        except Exception:
            self.store.readings.forget_heads()
            self._load(touched)
            self.monitor = self._monitor()
            self.held_count = self.store.record.count("held")
            raise

    def _reject(self, msg: Message, reason: str, excess: dict[str, Excess]) -> None:
        """Store one rejection, or count it in its topic's row once the topic is over its rate."""
        if self.limiter.admit(msg.topic, msg.received_ts):
            self.store.rejections.add(msg.received_ts, msg.topic, reason, msg.payload)
            return
        ex = excess.setdefault(msg.topic, Excess(msg.received_ts, reason, msg.payload))
        ex.n, ex.reason, ex.payload = ex.n + 1, reason, msg.payload

    def _command(self, msg: Message, result: BatchResult, excess: dict[str, Excess]) -> None:
        """An acknowledgement or a lot event. On `<topic>/<user>` the last level names the
        sender: the broker's ACL lets only that user write there (deploy/mosquitto/acl), so it
        is recorded as the identity the broker vouches for."""
        ack = self.config.broker.ack_topic
        base = ack if msg.topic == ack or msg.topic.startswith(ack + "/") else self.config.broker.lot_topic
        sender = msg.topic[len(base) + 1 :] or None
        try:
            if sender is not None and ("/" in sender or not topic_is_clean(sender)):
                raise InputError("topic", msg.topic, f"{base} or {base}/<user>")
            if base != ack:
                doc = parse_payload(msg.payload, msg.topic)
                record_event(self.store, self.config, doc, f"topic {msg.topic}", "mqtt", sender, msg.received_ts)
                result.counts["lot_event"] += 1
                return
            self.monitor.command(msg.payload, msg.received_ts, sender=sender)
            result.counts["command"] += 1
        except InputError as exc:
            self._reject(msg, str(exc), excess)
            result.rejections["ack_command" if base == ack else "lot_event"] += 1
            result.counts["rejected"] += 1

    def set_aside(self, msg: Message, reason: str) -> BatchResult:
        """Record a message that could not be handled as a rejection, in its own transaction."""
        result = BatchResult()
        with self.store.atomic():
            self.store.rejections.add(msg.received_ts, msg.topic, reason, msg.payload)
        result.counts["rejected"] += 1
        result.rejections["set_aside"] += 1
        return result

    def process_readings(self, items: list[tuple[Reading, float, str]], now: float | None = None) -> BatchResult:
        """Store and feed already-parsed readings (replay): (reading, received_ts, topic)."""
        now = time.time() if now is None else now
        result = BatchResult()
        touched: set[str] = set()
        with self._transaction(touched):
            self._store_readings(items, result, touched)
            self._finish(touched, result, now)
        return result

    def _store_readings(self, items: list[tuple[Reading, float, str]], result: BatchResult, touched: set) -> None:
        """One bulk insert when no reading is late or repeated (the usual case); row by row
        otherwise, to tell duplicates and late readings apart."""
        if not items:
            return
        keys = {(r.zone, r.sensor, r.signal, r.ts) for r, _, _ in items}
        if len(keys) == len(items) and not any(self.runners[r.zone].is_late(r) for r, _, _ in items):
            if self.store.readings.add_all_new(items):
                for r, received_ts, _ in items:
                    self.runners[r.zone].accept(r)
                    self.monitor.observe(r, received_ts)
                    touched.add(r.zone)
                result.counts["accepted"] += len(items)
                return
        for reading, received_ts, topic in items:
            self._store_reading(reading, received_ts, topic, result, touched)

    def _store_reading(
        self, reading: Reading, received_ts: float, topic: str, result: BatchResult, touched: set
    ) -> None:
        runner = self.runners[reading.zone]
        late = runner.is_late(reading)
        if not self.store.readings.add(reading, received_ts, topic, late):
            result.counts["duplicate"] += 1
            stored = self.store.readings.value_of(reading)
            if stored is not None and stored != reading.value:
                # The same sensor and time with another value: the first stays (the record is
                # append-only); the conflict is recorded, not just counted.
                why = f"conflicts with the stored reading at that time (stored {stored!r}, got {reading.value!r}); first kept"
                self.store.rejections.add(received_ts, topic, f"sensor {reading.sensor!r}: {why}", b"")
                result.rejections["conflicting_duplicate"] += 1
            return
        touched.add(reading.zone)
        self.monitor.observe(reading, received_ts)
        if late:
            result.counts["late"] += 1
            result.recomputed.add(reading.zone)
            result.late_from[reading.zone] = min(reading.ts, result.late_from.get(reading.zone, reading.ts))
        else:
            result.counts["accepted"] += 1
            runner.accept(reading)

    def _finish(self, touched: set[str], result: BatchResult, now: float) -> None:
        for zid in touched:
            if zid in result.recomputed:
                self.runners[zid] = self.recompute(zid, keep_after_ts=self.runners[zid].fed_ts)
                self.monitor.forget_after(zid, result.late_from[zid])
                log.info("zone %s: late reading stored and flagged; zone recomputed from stored readings", zid)
            runner = self.runners[zid]
            runner.heard_wall_ts = now
            due = now - self._last_checkpoint.get(zid, 0.0) >= self.checkpoint_s or zid in result.recomputed
            # The integrator gives the same state however the readings are chunked, so feeding
            # waits for the checkpoint (or a long queue): one model call per zone, not per batch.
            if due:
                self.checkpoint(zid, now)
            elif len(runner.pending) >= FEED_AT_PENDING:
                self._feed(runner)
            self.monitor.zone_step(self.runners[zid], self.last_figures.get(zid), due, now)
        self.monitor.apply_commands(now)

    def settle(self, now: float) -> None:
        """On the service's clock, with no batch needed: a zone with readings not yet in its
        checkpoint gets one once due, and a zone quiet for its reorder window releases what it
        still holds, so its figures reach its last reading even when no further reading comes
        (a backlog that arrived at once, a sensor that stopped). Call inside a transaction."""
        for zid, runner in self.runners.items():
            behind = runner.pending or runner.readings_total != self._checkpointed.get(zid)
            if not behind or now - self._last_checkpoint.get(zid, 0.0) < self.checkpoint_s:
                continue
            if runner.pending and now - runner.heard_wall_ts >= runner.window:
                self._feed(runner, release_all=True)
            self.checkpoint(zid, now)
            self.monitor.zone_step(runner, self.last_figures.get(zid), True, now)

    def _feed(self, runner: ZoneRunner, release_all: bool = False) -> None:
        runner.advance(release_all)
        for start, end in runner.new_gaps:
            self.store.gaps.add(runner.zone.id, start, end)
        runner.new_gaps.clear()

    def checkpoint(self, zid: str, now: float) -> None:
        """Feed the zone what its reorder window has released, then save state and figures."""
        runner = self.runners[zid]
        self._feed(runner)
        figures = runner.figures()
        self.last_figures[zid] = figures
        self.store.zones.save(
            ZoneRow(
                zone=zid,
                spec_key=spec_key(runner.zone),
                fed_ts=None if runner.fed_ts == float("-inf") else runner.fed_ts,
                state=None if runner.state is None else runner.state.arrays(),
                sensors=runner.sensors_blob(),
                figures=figures,
                readings_total=runner.readings_total,
                last_ts=runner.last_ts,
                last_air_c=runner.last_air_c,
                last_product_c=runner.last_product_c,
                updated_ts=now,
            )
        )
        self._last_checkpoint[zid] = now
        self._checkpointed[zid] = runner.readings_total

    def apply_retention(self, now: float) -> int:
        """Move each zone's anchor to the retention cut-off, then fold older raw readings into
        hourly aggregates. Returns the number of raw readings folded.

        The cut-off follows the data, not only the clock: a service clock that runs ahead of the
        newest reading by more than a day (a dead RTC battery once put it 401 days ahead and
        retention deleted every raw reading) is not believed; the newest reading's time plus a
        day is used, and the disagreement logged."""
        newest = self.store.readings.newest_ts()
        if newest is None:
            return 0
        if now > newest + CLOCK_TRUST_S:
            log.warning(
                "retention: the service clock is %.1f days ahead of the newest reading; cutting by the data's time",
                (now - newest) / 86400.0,
            )
            now = newest + CLOCK_TRUST_S
        cutoff = now - self.config.storage.raw_retention_days * 86400.0
        with self.store.retention_pass():
            return self._fold_all(cutoff, now)

    def _fold_all(self, cutoff: float, now: float) -> int:
        folded = 0
        for zid in self.runners:
            runner, after = self._from_anchor(zid)
            runner.keep_after_ts = math.inf  # a stand-in that moves the anchor: nothing to judge
            if after is not None and after >= cutoff:
                continue
            rows = list(self.store.readings.of_zone(zid, after, cutoff))
            if not rows:
                continue
            for sensor, signal, ts, value in rows:
                runner.accept(Reading(zid, sensor, signal, ts, value))
            runner.max_ts = max(runner.max_ts, cutoff + runner.window)  # release everything up to the cut-off
            runner.advance()
            with self.store.atomic():
                self.store.zones.anchor_save(
                    zid,
                    spec_key(runner.zone),
                    None if runner.fed_ts == float("-inf") else runner.fed_ts,
                    None if runner.state is None else runner.state.arrays(),
                    runner.sensors_blob(),
                )
                folded += self.store.readings.fold(zid, runner.fed_ts, now)
        with self.store.atomic():
            self.store.rejections.prune(cutoff, now)
        return folded

    def checkpoint_all(self, now: float | None = None, final: bool = True) -> None:
        """Checkpoint every zone and bring its events up to the data it has (final: stop, reload,
        end of a replay; not final: a checkpoint along a long replay, events judged only at their
        grid points of data time, as the live service does)."""
        now = time.time() if now is None else now
        with self.store.atomic():
            for zid in self.runners:
                self.checkpoint(zid, now)
                self.monitor.zone_step(self.runners[zid], self.last_figures.get(zid), True, now, final=final)


def _inject(messages: list[Message]) -> None:
    for m in messages:
        if _CRASH_ON and _CRASH_ON in m.payload:
            os._exit(70)
        if _RAISE_ON and _RAISE_ON in m.payload:
            raise RuntimeError("injected fault (WATCHER_TEST_RAISE_ON)")
