"""`watcher demo`: the whole pipeline on the invented demo site, in about a minute.

With mosquitto installed, a private broker starts on a free loopback port, the service runs
in this process (MQTT edge in its child process, as in production) and the demo publishes two
weeks of sensor messages to it, fast. Without mosquitto, the same messages go straight into
the engine. Either way the model, events, alerts and the weekly summary are the real ones.
"""

from __future__ import annotations

import datetime as dt
import shutil
import socket
import subprocess
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

from watcher import demo as site
from watcher.config import load_config
from watcher.engine.batch import Engine, Message
from watcher.errors import StoreError
from watcher.report.produce import produce
from watcher.report.week import last_complete_week
from watcher.service import Service
from watcher.store.db import Store

BATCH = 2000
# Checkpoint at every batch: a live service checkpoints every 10 s, which at one reading a
# minute is every batch; the demo runs two weeks in seconds, so wall-clock checkpoints would
# leave hours between model snapshots.
DEMO_CHECKPOINT_S = 0.0


def mosquitto() -> str | None:
    return shutil.which("mosquitto") or ("/usr/sbin/mosquitto" if Path("/usr/sbin/mosquitto").exists() else None)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class AlertPrinter:
    """Prints raised and cleared alerts as the service records them."""

    def __init__(self, db: Path, say: Callable[[str], None], tz: str):
        self.db, self.say, self.tz, self.seen = db, say, tz, 0

    def poll(self) -> int:
        if not self.db.exists():
            return 0
        try:
            store = Store(str(self.db), readonly=True)
            try:
                rows = store.alerts.steps_after(self.seen, ("raise", "clear"))
            finally:
                store.close()
        except StoreError:  # the service has not made its tables yet
            return 0
        for row_id, step, at_ts, zone, severity, label in rows:
            when = dt.datetime.fromtimestamp(at_ts, dt.UTC).astimezone(__import__("zoneinfo").ZoneInfo(self.tz))
            mark = f"ALERT {severity.upper()}" if step == "raise" else "cleared"
            self.say(f"  {when:%a %d %b %H:%M}  {mark:<16} {zone:<10} {label}")
            self.seen = row_id
        return len(rows)


def run(
    out_dir: str,
    use_broker: bool,
    say: Callable[[str], None],
    progress: Callable[[float], None],
    now: float | None = None,
) -> dict:
    folder = Path(out_dir).resolve()
    folder.mkdir(parents=True, exist_ok=True)
    for old in ("watcher.db", "watcher.db-wal", "watcher.db-shm"):
        (folder / old).unlink(missing_ok=True)
    now = time.time() if now is None else now  # fixed by tests so that two runs see the same data
    week = last_complete_week(now, site.TIMEZONE)
    start = week.start_ts - 2 * 86400.0
    days = (now - 300.0 - start) // 60.0 * 60.0 / 86400.0
    # The showcase fault on the Thursday of the week the summary covers, whatever today is.
    zones = site.build(start, days, fault_day=(week.start_ts + 3.4 * 86400.0 - start) / 86400.0)
    msgs = site.messages(zones)
    broker_exe = mosquitto() if use_broker else None
    port = _free_port() if broker_exe else None
    config_path = folder / "watcher.toml"
    config_path.write_text(site.config_text(str(folder), port))
    cfg = load_config(str(config_path))
    say(f"Demo site: {site.SITE_NAME} (invented data).")
    for z in zones:
        say(f"  {z.name:<17} setpoint {z.setpoint_c:g} C: {z.regime}")
    say(
        f"{days:.1f} days of sensor messages ({sum(1 for m in msgs if m[1] != 'watcher/lots'):,}) and "
        f"{sum(1 for m in msgs if m[1] == 'watcher/lots')} lot events from {dt.datetime.fromtimestamp(start, dt.UTC):%d %b} to now."
    )
    printer = AlertPrinter(folder / "watcher.db", say, site.TIMEZONE)
    started = time.monotonic()
    if broker_exe:
        say(f"Through a private mosquitto on 127.0.0.1:{port} and the real service (MQTT 5, QoS 1, acks after commit).")
        counts = _through_broker(broker_exe, port, cfg, msgs, printer, progress)
    else:
        say("mosquitto is not installed: feeding the engine in this process instead (same model, alerts and report).")
        counts = _in_process(cfg, msgs, printer, progress)
    printer.poll()

    store = Store.configured(cfg.storage)
    try:
        paths = produce(store, cfg, cfg.sites[0], week, time.time(), cfg.reports.dir, cfg.reports.formats, False, False)
    finally:
        store.close()
    return {
        "seconds": time.monotonic() - started,
        "counts": counts,
        "week": week.label,
        "report": str(next(p for p in paths if p.suffix == ".html")),
        "database": cfg.storage.path,
        "config": str(config_path),
    }


def _through_broker(exe, port, cfg, msgs, printer, progress) -> dict:
    import paho.mqtt.client as mqtt

    conf = Path(tempfile.mkdtemp(prefix="watcher-demo-")) / "mosquitto.conf"
    conf.write_text(
        f"listener {port} 127.0.0.1\nallow_anonymous true\npersistence false\n"
        "max_inflight_messages 20000\nmax_queued_messages 0\nlog_dest none\n"
    )
    broker = subprocess.Popen([exe, "-c", str(conf)], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    service = None
    try:
        for _ in range(100):
            try:
                socket.create_connection(("127.0.0.1", port), timeout=0.2).close()
                break
            except OSError:
                time.sleep(0.05)
        service = Service(cfg, checkpoint_s=DEMO_CHECKPOINT_S)
        service.start()
        # A new session queues nothing published before it subscribed: wait for it first.
        if not service.mqtt.connected.wait(30):
            raise RuntimeError(f"the demo service could not connect to its broker: {service.mqtt.last_error}")
        time.sleep(0.5)
        pub = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="demo-sensors", protocol=mqtt.MQTTv311)
        pub.max_inflight_messages_set(2000)
        pub.connect("127.0.0.1", port)
        pub.loop_start()
        for lo in range(0, len(msgs), BATCH):
            infos = [pub.publish(topic, payload, qos=1) for _, topic, payload in msgs[lo : lo + BATCH]]
            for info in infos:
                info.wait_for_publish(30)
            _wait_stored(cfg.storage.path, lo, BATCH, printer)
            progress(min(1.0, (lo + BATCH) / len(msgs)))
        pub.loop_stop()
        pub.disconnect()
        _wait_stored(cfg.storage.path, len(msgs), 0, printer, final=True)
    finally:
        if service is not None:
            service.stop()  # the final checkpoint also brings events and daily figures up to date
        broker.terminate()
        broker.wait(10)
    return {"published": len(msgs)}


def _stored(db: str) -> int:
    """Messages the service has dealt with: stored as readings, lot events or rejections."""
    try:
        store = Store(str(db), readonly=True)
        try:
            return store.record.messages_handled()
        finally:
            store.close()
    except StoreError:  # the service has not made its tables yet
        return 0


def _wait_stored(db, lo, batch, printer, final=False) -> None:
    """Keep the publisher at most a batch or two ahead of the service (and print alerts)."""
    target = lo if final else max(0, lo - batch)
    deadline = time.monotonic() + 120
    while _stored(db) < target and time.monotonic() < deadline:
        printer.poll()
        time.sleep(0.05)
    printer.poll()


def _in_process(cfg, msgs, printer, progress) -> dict:

    store = Store.configured(cfg.storage)
    engine = Engine(cfg, store, checkpoint_s=DEMO_CHECKPOINT_S)
    counts = {}
    step = cfg.ingest.batch_max  # batches as small as the service's, so rules are judged as often
    try:
        for lo in range(0, len(msgs), step):
            now = time.time()
            result = engine.process([Message(t, p, now, 0, 1) for _, t, p in msgs[lo : lo + step]], now)
            for k, v in result.counts.items():
                counts[k] = counts.get(k, 0) + v
            printer.poll()
            if (lo // step) % 20 == 0 or lo + step >= len(msgs):
                progress(min(1.0, (lo + step) / len(msgs)))
        engine.checkpoint_all()
    finally:
        store.close()
    return counts
