"""The long-running service: wiring of threads, signals, systemd notification and health.

Threads: the MQTT edge runs in a child process (watcher.ingest.mqtt_process, so paho and the
writer do not share one interpreter lock) and relays messages into a queue; the writer
thread owns the database, processes batches (parse, dedup, store, feed the model, commit) and
only then acknowledges them; the health thread serves HTTP. The main thread waits for signals,
pings the systemd watchdog while the worker threads are alive, and stops everything cleanly.
A broker outage keeps the service up (and the watchdog fed): it reconnects by itself.
"""

from __future__ import annotations

import collections
import logging
import os
import signal
import threading
import time
from dataclasses import replace

from watcher.alerts.bypass import StorageBypass
from watcher.alerts.delivery import Notifier, deliver_due
from watcher.config import Config, load_config
from watcher.engine.batch import Engine, Message
from watcher.engine.held import readmit
from watcher.engine.route import topic_filters
from watcher.engine.trial import find_breakers
from watcher.errors import StoreError, WatcherError
from watcher.health import HealthServer, Metrics
from watcher.ingest.mqtt_process import MqttProcess
from watcher.ingest.suspects import Suspects
from watcher.report.schedule import due_weeks
from watcher.store.db import Store, pending_migrations
from watcher.systemd import sd_notify

log = logging.getLogger("watcher.service")
RETENTION_EVERY_S = 6 * 3600.0
TICK_S = 1.0
DELIVER_EVERY_S = 0.5
REPORT_CHECK_S = 60.0
READMIT_EVERY_S = 60.0
CLOCK_JUMP_S = 60.0


class Service:
    def __init__(self, config: Config, checkpoint_s: float = 10.0):
        self.config = config
        self.checkpoint_s = checkpoint_s
        self.metrics = Metrics()
        # A deque, not queue.Queue: appends from the network thread take no lock and wake
        # nobody; the writer polls it, so a busy stream costs no thread hand-off per message.
        self.inbox: collections.deque[Message] = collections.deque()
        self.stopping = threading.Event()
        self.db_ok = False
        self.last_commit_error: str | None = None
        self._pending_config: Config | None = None
        self._reload_not_before = 0.0
        self._queue_peak = 0
        self._config_lock = threading.Lock()
        pending = pending_migrations(config.storage.path)
        if pending:  # a big record's migration takes minutes: systemd's start timeout must wait
            sd_notify("EXTEND_TIMEOUT_USEC=7200000000")
            sd_notify(f"STATUS=bringing the database up to date ({', '.join(pending)})")
            log.info("bringing %s up to date (%s): a big record takes minutes", config.storage.path, ", ".join(pending))
        self.store = Store.configured(config.storage)
        self.suspects = Suspects(config.storage.path + ".inhand")
        self.last_progress = time.monotonic()  # the writer's last commit, or its last idle moment
        self._clock_seen: tuple[float, float] | None = None
        self._readmit_due = 0.0
        self.engine = Engine(config, self.store, checkpoint_s)
        self.bypass = StorageBypass(config)
        self.db_ok = True
        self._publish_zone_metrics()
        self.mqtt = MqttProcess(config.broker, topic_filters(config), self.inbox, self._on_link)
        self.writer = threading.Thread(target=self._writer_loop, name="writer", daemon=True)
        self.deliverer = threading.Thread(target=self._deliver_loop, name="deliverer", daemon=True)
        self.reporter = threading.Thread(target=self._report_loop, name="reporter", daemon=True)
        self.health: HealthServer | None = None
        if config.health.port:
            self.health = HealthServer(
                config.health.host, config.health.port, self.metrics, self.healthz, self.readyz, self._site_page
            )
        self._page = None

    def _site_page(self) -> bytes:
        """The site page (report/page.py), made for the configuration in force; the report stack
        is imported on the first request, not at start."""
        from watcher.report.page import SitePage

        if self._page is None or self._page.config is not self.config:
            self._page = SitePage(self.config)
        return self._page.html()

    def _on_link(self, event: str, detail) -> None:
        if event == "connected":
            self.metrics.reconnects.inc()

    # --- health --------------------------------------------------------------------------
    def healthz(self):
        threads = {"writer": self.writer.is_alive(), "mqtt": self.mqtt.alive(), "deliverer": self.deliverer.is_alive()}
        stalled_s = time.monotonic() - self.last_progress
        stalled = stalled_s > self.config.ingest.stall_limit_s
        detail = {"threads": threads, "mqtt_callback_errors": self.mqtt.callback_errors}
        if stalled:
            # The watchdog restarts the service: a writer that has not committed for this long
            # is wedged or its storage is (the storage alert went out around the database).
            detail["writer_stalled_s"] = round(stalled_s, 1)
            detail["commit_error"] = self.last_commit_error
        return all(threads.values()) and not stalled, detail

    def readyz(self):
        detail = {
            "config": self.config.path,
            "database": self.db_ok,
            "broker": self.mqtt.connected.is_set(),
            "broker_error": self.mqtt.last_error,
            "commit_error": self.last_commit_error,
        }
        return bool(self.db_ok and self.mqtt.connected.is_set()), detail

    # --- writer thread ---------------------------------------------------------------------
    def _next_batch(self) -> list[Message]:
        limit = self.config.ingest.batch_max
        deadline = time.monotonic() + 0.2
        while not self.inbox and time.monotonic() < deadline:
            time.sleep(0.002)
        if not self.inbox:
            return []
        fill_until = time.monotonic() + self.config.ingest.batch_wait_s
        while len(self.inbox) < limit and time.monotonic() < fill_until:
            time.sleep(0.001)
        batch = []
        while self.inbox and len(batch) < limit:
            batch.append(self.inbox.popleft())
        return batch

    def _commit(self, batch: list[Message], careful: bool = True) -> None:
        """Handle a batch until it is committed, then acknowledge it.

        Storage faults (StoreError) are retried with backoff: nothing is acknowledged until the
        record holds the batch. Any other error belongs to a message: the batch is split in
        halves until the message is alone, and that message is set aside (stored as a
        rejection with the error) and acknowledged, so one message cannot stop a site.
        Suspects from a process that died mid-batch go alone, or are set aside (suspects.py)."""
        if careful and self.suspects.counts:
            batch = self._handle_suspects(batch)
            if not batch:
                return
        self.suspects.holding(batch)
        try:
            result = self._until_stored(lambda: self.engine.process(batch), len(batch))
        except StoreError:
            return  # stopping with the batch uncommitted: it stays unacknowledged
        except Exception as exc:
            if len(batch) > 1:
                log.warning(
                    "a batch of %d failed (%s: %s); splitting it to find the message",
                    len(batch),
                    type(exc).__name__,
                    exc,
                )
                mid = len(batch) // 2
                self._commit(batch[:mid], careful)
                self._commit(batch[mid:], careful)
                return
            log.error("message on %s could not be handled; set aside", batch[0].topic, exc_info=exc)
            reason = f"could not be handled ({type(exc).__name__}: {str(exc)[:200]}); set aside"
            self._set_aside(batch[0], reason)
            return
        self._acknowledge(batch, result)

    def _handle_suspects(self, batch: list[Message]) -> list[Message]:
        """Messages in hand when the last process died are tried first in a throwaway process;
        one that ends or hangs it is set aside. Returns the batch without those."""

        suspects = [m for m in batch if self.suspects.starts(m)]
        if not suspects:
            return batch
        log.warning("trying %d message(s) that were in hand when the last process died", len(suspects))
        breakers = find_breakers(self.config.path, suspects)
        for i, why in breakers.items():
            m = suspects[i]
            reason = (
                f"handling it ends the service ({why}; in hand when {self.suspects.starts(m)} start(s) died); set aside"
            )
            log.error("message on %s: %s", m.topic, reason)
            self._set_aside(m, reason)
        set_aside = {id(suspects[i]) for i in breakers}
        self.suspects.done([m for m in suspects if id(m) not in set_aside])  # cleared by the trial
        return [m for m in batch if id(m) not in set_aside]

    def _set_aside(self, msg: Message, reason: str) -> None:
        self.suspects.holding([msg])
        try:
            result = self._until_stored(lambda: self.engine.set_aside(msg, reason), 1)
        except StoreError:
            return  # stopping: it stays unacknowledged
        self._acknowledge([msg], result)

    def _until_stored(self, step, n: int):
        """Run one transaction, retrying storage faults with backoff; StoreError when stopping."""
        delay = 0.1
        failing_since = None
        while True:
            started = time.perf_counter()
            try:
                result = step()
            except StoreError as exc:  # disk full, database locked for too long, ...
                self.db_ok = False
                self.last_commit_error = str(exc)
                self.metrics.commit_failures.inc()
                failing_since = failing_since or time.time()
                self.bypass.failing(failing_since, time.time(), self.last_commit_error)
                if self.stopping.is_set():
                    log.error(
                        "stopping with %d uncommitted messages; they stay unacknowledged and the broker sends them "
                        "again after the restart: %s",
                        n,
                        self.last_commit_error,
                    )
                    raise
                log.error("commit failed, nothing acknowledged, retrying in %.1f s: %s", delay, self.last_commit_error)
                self.stopping.wait(delay)
                delay = min(delay * 2.0, 5.0)  # cheap to retry; resume soon after space is freed
                continue
            break
        self.db_ok = True
        self.last_commit_error = None
        self.last_progress = time.monotonic()
        if failing_since is not None:
            self._record_bypass()
        self.metrics.commit_seconds.observe(time.perf_counter() - started)
        return result

    def _acknowledge(self, batch: list[Message], result) -> None:
        self.suspects.done(batch)
        for kind, n in result.counts.items():
            self.metrics.readings.labels(kind).inc(n)
        for reason, n in result.rejections.items():
            self.metrics.rejections.labels(reason).inc(n)
        self.mqtt.ack(batch)
        acked_ts = time.time()
        for m in batch:
            self.metrics.ack_seconds.observe(acked_ts - m.received_ts)
        self._publish_zone_metrics()

    def _record_bypass(self) -> None:
        episode = self.bypass.recovered()
        if episode is None:
            return
        try:
            with self.store.atomic():
                self.engine.monitor.record_bypass(episode, time.time())
        except Exception as exc:
            log.error("could not record the storage alert sent around the database: %s", exc)

    def _publish_zone_metrics(self) -> None:
        for zid, runner in self.engine.runners.items():
            if runner.last_ts is not None:
                self.metrics.zone_last_ts[zid] = runner.last_ts
            if runner.last_air_c is not None:
                self.metrics.zone_air_c[zid] = runner.last_air_c
            figures = self.engine.last_figures.get(zid)
            if figures is not None:
                self.metrics.zone_figures[zid] = figures
        self.metrics.open_alerts = self.engine.monitor.alerts.open_by_severity()

    def _retention(self) -> None:
        """Fold raw readings older than the retention period into hourly aggregates."""
        try:
            folded = self.engine.apply_retention(time.time())
            if folded:
                log.info(
                    "retention: %d raw readings older than %d days folded into hourly aggregates",
                    folded,
                    self.config.storage.raw_retention_days,
                )
        except Exception as exc:
            log.error("retention step failed (it runs again later): %s", exc)

    def _tick(self) -> None:
        """Checkpoints that no batch triggered, acknowledgements and the data rules, on the
        service's clock."""
        try:
            with self.store.atomic():
                now = time.time()
                self.engine.settle(now)  # figures reach the last reading even when no batch comes
                self.engine.monitor.tick(now, self.mqtt.connected.is_set(), self.db_ok)
        except Exception as exc:
            log.error("alert tick failed (it runs again in a second): %s", exc)
            return
        self._publish_zone_metrics()  # settled figures and alerts raised or cleared by the tick

    def _readmit(self) -> None:
        """Held readings whose time now agrees with the clock go in (engine/held.py)."""

        try:
            result = self._until_stored(lambda: readmit(self.engine, time.time()), 0)
        except StoreError:
            return
        except Exception as exc:
            log.error("re-admitting held readings failed (trying again in a minute): %s", exc)
            return
        for kind, n in result.counts.items():
            self.metrics.readings.labels(kind).inc(n)

    def _watch_clock(self) -> None:
        """A step of the wall clock against the monotonic clock is a clock jump (NTP stepping a
        wrong clock, someone setting it by hand): the alert rules hear of it."""
        wall, mono = time.time(), time.monotonic()
        if self._clock_seen is not None:
            jump = (wall - self._clock_seen[0]) - (mono - self._clock_seen[1])
            if abs(jump) >= CLOCK_JUMP_S:
                log.warning("the service clock jumped by %+.0f s", jump)
                self.engine.monitor.clock_jumped(jump, wall)
                self._readmit_due = 0.0  # held readings may agree with the clock now
        self._clock_seen = (wall, mono)

    def _writer_loop(self) -> None:
        next_retention = 0.0
        next_tick = 0.0
        self._readmit_due = 0.0
        while True:
            if time.monotonic() >= next_retention:
                self._retention()
                next_retention = time.monotonic() + RETENTION_EVERY_S
                self.last_progress = time.monotonic()  # a long pass is work, not a stall
            if time.monotonic() >= next_tick:
                self._watch_clock()
                self._tick()
                next_tick = time.monotonic() + TICK_S
            if self.engine.held_count and time.monotonic() >= self._readmit_due:
                self._readmit()
                self._readmit_due = time.monotonic() + READMIT_EVERY_S
            self._apply_pending_config()
            batch = self._next_batch()
            depth = len(self.inbox) + len(batch)
            self.metrics.queue_depth.set(depth)
            if depth > self._queue_peak:
                self._queue_peak = depth
                self.metrics.queue_peak.set(depth)
            if batch:
                self._commit(batch)
            else:
                self.last_progress = time.monotonic()
                if self.stopping.is_set():
                    break
        try:
            self.engine.checkpoint_all()
        except Exception as exc:
            log.error("final checkpoint failed (state will be rebuilt from stored readings): %s", exc)

    # --- deliverer thread ------------------------------------------------------------------
    def _deliver_loop(self) -> None:
        """Send the outbox on its own database connection, apart from ingestion: a receiver
        that hangs delays only other notifications, never readings."""
        store = Store.configured(self.config.storage)
        with store.atomic():
            again = store.outbox.recover()
        if again:
            log.warning("%d notifications were cut off by a restart mid-send; sending them again", again)
        channels, notifier = None, None
        while not self.stopping.is_set():
            try:
                if self.config.channels != channels:
                    notifier = Notifier(list(self.config.channels))
                    channels = self.config.channels
                    for name, url in notifier.describe().items():
                        log.info("notification channel %s: %s", name, url)
                counts = deliver_due(store, notifier, time.time(), retry_first_s=self.config.alerting.retry_first_s)
                for kind, n in counts.items():
                    self.metrics.notifications.labels(kind).inc(n)
            except Exception as exc:
                log.error("delivery step failed (retrying): %s", exc)
            self.stopping.wait(DELIVER_EVERY_S)
        store.close()

    # --- reporter thread -------------------------------------------------------------------
    def _report_loop(self) -> None:
        """Produce each site's weekly summary once it is due ([reports] weekday and time, in the
        site's zone); recorded in the database, so a restart never produces a week twice."""

        store = Store.configured(self.config.storage)
        while not self.stopping.is_set():
            try:
                due = due_weeks(store, self.config, time.time())
                for site, week in due:
                    from watcher.report.produce import produce  # pandas and matplotlib load only now

                    produce(
                        store,
                        self.config,
                        site,
                        week,
                        time.time(),
                        self.config.reports.dir,
                        self.config.reports.formats,
                        send=True,
                        auto=True,
                    )
                self.metrics.report_checks.labels("produced" if due else "nothing_due").inc()
            except Exception as exc:
                self.metrics.report_checks.labels("failed").inc()
                log.error("weekly summary failed (trying again in a minute): %s", exc)
            self.stopping.wait(REPORT_CHECK_S)
        store.close()

    # --- reload ----------------------------------------------------------------------------
    def request_reload(self) -> None:
        """SIGHUP: validate the new file; swap it in only if it is valid."""
        try:
            new = load_config(self.config.path)
        except WatcherError as exc:
            log.error("reload refused, keeping the running configuration: %s", exc)
            return
        if new.broker != self.config.broker or new.storage != self.config.storage:
            log.warning("reload: broker and storage settings take effect at the next restart")
        with self._config_lock:
            self._pending_config = new

    def _apply_pending_config(self) -> None:
        with self._config_lock:
            pending = self._pending_config
        if pending is None or time.monotonic() < self._reload_not_before:
            return
        new = replace(pending, broker=self.config.broker, storage=self.config.storage)
        try:
            self.engine.checkpoint_all()
            engine = Engine(new, self.store, self.checkpoint_s)
        except StoreError as exc:
            # The database is locked or full: keep running on the old configuration and try
            # the swap again shortly (a reload must never cost the writer).
            log.error("reload waits for the database (running configuration kept for now): %s", exc)
            self._reload_not_before = time.monotonic() + 5.0
            return
        with self._config_lock:
            if self._pending_config is pending:  # a newer SIGHUP may have replaced it meanwhile
                self._pending_config = None
        self.engine = engine
        self.bypass = StorageBypass(new)
        self.config = new
        self.mqtt.resubscribe(topic_filters(new))
        log.info("reload: configuration swapped (%d zones, %d sources)", len(new.zones), len(new.sources))

    # --- lifecycle -------------------------------------------------------------------------
    def start(self) -> None:
        self.writer.start()
        self.deliverer.start()
        self.reporter.start()
        self.mqtt.start()
        if self.health:
            self.health.start()
        log.info(
            "started: %d zones, subscribing to %s, database %s",
            len(self.config.zones),
            ", ".join(topic_filters(self.config)),
            self.config.storage.record,
        )

    def stop(self) -> None:
        """Drain what was received, commit, publish offline, disconnect."""
        sd_notify("STOPPING=1")
        log.info("stopping: draining %d queued messages", len(self.inbox))
        self.stopping.set()
        self.writer.join(60.0)
        self.deliverer.join(30.0)
        self.reporter.join(30.0)
        self.mqtt.stop()
        if self.health:
            self.health.stop()
        self.store.close()
        log.info("stopped")

    def run_forever(self) -> int:
        """Run until SIGTERM/SIGINT; SIGHUP reloads. Returns the exit code."""
        stop_now = threading.Event()
        reload_now = threading.Event()
        signal.signal(signal.SIGTERM, lambda *_: stop_now.set())
        signal.signal(signal.SIGINT, lambda *_: stop_now.set())
        signal.signal(signal.SIGHUP, lambda *_: reload_now.set())
        self.start()
        sd_notify("READY=1")
        watchdog_us = int(os.environ.get("WATCHDOG_USEC", "0") or 0)
        ping_every = watchdog_us / 2e6 if watchdog_us else None
        last_ping = 0.0
        while not stop_now.wait(0.2):
            if reload_now.is_set():
                reload_now.clear()
                self.request_reload()
            ok, _ = self.healthz()
            if ping_every and ok and time.monotonic() - last_ping >= ping_every:
                sd_notify("WATCHDOG=1")
                last_ping = time.monotonic()
            if not self.writer.is_alive():
                log.error("the writer thread has died; exiting so systemd restarts the service")
                self.mqtt.stop(2.0)
                return 1
        self.stop()
        return 0
