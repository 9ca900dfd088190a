"""Helpers for tests that run `watcher run` as a real process against a real broker."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path

import numpy as np
import paho.mqtt.client as mqtt

from tests.broker import Broker, free_port
from watcher.config import load_config
from watcher.engine.batch import Engine
from watcher.store.db import Store

T0 = 1_795_000_000.0  # 2026-11-18T...Z; readings are stamped from here, a minute apart
SITE_NAMES = {"kp": "Kestrel Point", "kestrel": "Kestrel Point", "harbour": "Harbour Row"}
AIR_SOURCE_TOML = """[[sources]]
pattern = "kp/{zone}/{sensor}/air"
signal = "air_c"
value = "temp_c"
time = "ts"
time_format = "epoch_s"
"""


TIMED_DOOR_SOURCE_TOML = """
[[sources]]
pattern = "kp/{zone}/{sensor}/door"
signal = "door"
value = "open"
time = "ts"
time_format = "epoch_s"
"""


def write_secret(path: Path, text: str) -> Path:
    """A file holding a secret, readable by its owner only (as watcher expects)."""
    path.write_text(text)
    path.chmod(0o600)
    return path


AIR_ALERT_AT_ONCE_TOML = """
[[alerts.rules]]
id = "air-benchmark"
above = -30.0
for_min = 0
"""  # -25 C air raises it with the first reading: an alert to deliver, at once


def channel_toml(folder: Path, name: str, url: str) -> str:
    """A notification channel: its URL in a secret file, the [[notify]] table that reads it."""
    write_secret(folder / f"{name}.url", url + "\n")
    return f"""
[[notify]]
name = "{name}"
url_file = "{folder / f"{name}.url"}"
tags = ["alerts"]
min_interval_s = 0
"""


def write_config(
    folder: Path,
    broker: Broker,
    zones=("bulk-a", "dispatch"),
    extra: str = "",
    tls: bool = False,
    health_port: int | None = None,
    reorder_s: float = 120.0,
    reports: bool = False,
    stall_limit_s: float = 600.0,
    site: str = "kp",
) -> Path:
    port = broker.tls_port if tls else broker.port
    tls_block = f'\n[broker.tls]\nca_file = "{broker.tls["ca"]}"\n' if tls else ""
    zone_blocks = "".join(f'\n[[zones]]\nid = "{z}"\nsetpoint_c = -25.0\n' for z in zones)
    health_port = free_port() if health_port is None else health_port
    text = f"""
[broker]
host = "{"localhost" if tls else "127.0.0.1"}"
port = {port}
client_id = "watcher-test-{folder.name[-12:]}"
username = "{broker.USER}"
password_file = "{folder / "watcher-password"}"
keepalive_s = 5
reconnect_min_s = 0.1
reconnect_max_s = 1.0
{tls_block}
[storage]
path = "{folder / "watcher.db"}"

[ingest]
reorder_window_s = {reorder_s}
max_gap_s = 900.0
stall_limit_s = {stall_limit_s}

[health]
port = {health_port}

[reports]
enabled = {"true" if reports else "false"}
dir = "{folder / "reports"}"

[[sites]]
id = "{site}"
name = "{SITE_NAMES.get(site, site)} (test)"
timezone = "Europe/London"
{zone_blocks}
{AIR_SOURCE_TOML.replace('"kp/', f'"{site}/')}
[[sources]]
pattern = "{site}/{{zone}}/door"
signal = "door"
format = "number"
{extra}
"""
    write_secret(folder / "watcher-password", broker.PASSWORD + "\n")
    path = folder / "watcher.toml"
    path.write_text(text)
    return path


def air_value(zone_index: int, k: int) -> float:
    """A deterministic air history: -25 C with a 30-min defrost every 6 h (+6 K)."""
    return -25.0 + (6.0 if ((k + 37 * zone_index) % 360) < 30 else 0.0)


def messages(zones, first: int, count: int, site: str = "kp") -> list[tuple[str, bytes]]:
    out = []
    for k in range(first, first + count):
        for i, z in enumerate(zones):
            out.append((f"{site}/{z}/s1/air", json.dumps({"temp_c": air_value(i, k), "ts": T0 + 60 * k}).encode()))
    return out


class Publisher:
    """A QoS 1 publisher that waits for every PUBACK and caps what is in flight."""

    def __init__(self, broker: Broker, client_id: str = "test-sensors"):
        self.client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=client_id, protocol=mqtt.MQTTv311)
        self.client.username_pw_set("sensor", "sensor-pw")
        self.client.max_inflight_messages_set(1000)
        self.acked: set[int] = set()  # mids the broker has acknowledged (also for ones queued while it was down)
        self.client.on_publish = lambda client, userdata, mid, rc, props: self.acked.add(mid)
        self.client.connect("127.0.0.1", broker.port)
        self.client.loop_start()

    def send(self, items, retain=False) -> None:
        infos = []
        for topic, payload in items:
            infos.append(self.client.publish(topic, payload, qos=1, retain=retain))
            if len(infos) >= 2000:
                for i in infos:
                    i.wait_for_publish(30)
                infos = []
        for i in infos:
            i.wait_for_publish(30)
            assert i.is_published()

    def close(self) -> None:
        self.client.loop_stop()
        self.client.disconnect()


RUNNING: list = []


class WatcherProcess:
    def __init__(self, config: Path, env: dict | None = None):
        self.config = config
        self.log = config.parent / "watcher.log"
        self.health_port = int(
            next(
                line.split("=")[1]
                for line in config.read_text().splitlines()
                if line.startswith("port =") and "health" in _section_of(config, line)
            )
        )
        full_env = dict(os.environ)
        full_env.update(env or {})
        self._log_fh = self.log.open("ab")
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "watcher", "run", "--config", str(config)],
            stdout=self._log_fh,
            stderr=subprocess.STDOUT,
            env=full_env,
        )
        self._log_fh.close()  # the child has its own copy
        RUNNING.append(self.proc)

    def url(self, path: str) -> str:
        return f"http://127.0.0.1:{self.health_port}{path}"

    def get(self, path: str) -> tuple[int, bytes]:
        try:
            with urllib.request.urlopen(self.url(path), timeout=2) as r:
                return r.status, r.read()
        except urllib.error.HTTPError as e:
            return e.code, e.read()
        except OSError:  # not listening yet
            return 0, b"{}"

    def wait_ready(self, timeout: float = 30.0) -> None:
        deadline = time.time() + timeout
        while time.time() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError("watcher exited early:\n" + self.log.read_text()[-3000:])
            if self.get("/readyz")[0] == 200:
                return
            time.sleep(0.1)
        raise RuntimeError("watcher not ready:\n" + self.log.read_text()[-3000:])

    def stop(self, timeout: float = 60.0) -> int:
        self.proc.send_signal(signal.SIGTERM)
        return self.proc.wait(timeout)

    def children(self) -> list[int]:
        try:
            return [int(x) for x in Path(f"/proc/{self.proc.pid}/task/{self.proc.pid}/children").read_text().split()]
        except OSError:
            return []

    def kill(self) -> None:
        """SIGKILL the service; its network process must not outlive it (it would hold the client id)."""
        kids = self.children()
        self.proc.send_signal(signal.SIGKILL)
        self.proc.wait(10)
        deadline = time.time() + 10
        while any(Path(f"/proc/{k}").exists() and "zombie" not in _state(k) for k in kids):
            assert time.time() < deadline, f"orphaned network process(es) {kids} after SIGKILL"
            time.sleep(0.05)


def _state(pid: int) -> str:
    try:
        return Path(f"/proc/{pid}/status").read_text().split("State:")[1].split("\n")[0].lower()
    except (OSError, IndexError):
        return "gone"


def _section_of(config: Path, wanted: str) -> str:
    section = ""
    for line in config.read_text().splitlines():
        if line.startswith("["):
            section = line
        if line == wanted:
            return section
    return ""


def readings_count(db: Path) -> int:
    import sqlite3

    conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    try:
        return conn.execute("SELECT count(*) FROM readings").fetchone()[0]
    finally:
        conn.close()


def wait_for(predicate, timeout: float = 60.0, what: str = "condition") -> None:
    deadline = time.time() + timeout
    while time.time() < deadline:
        if predicate():
            return
        time.sleep(0.1)
    raise AssertionError(f"timed out waiting for {what}")


def assert_state_equals_recomputation(config_path, zones=("bulk-a", "dispatch")) -> None:
    """Each zone's stored state equals a full recomputation from its stored readings (1e-9)."""
    cfg = load_config(str(config_path))
    store = Store(cfg.storage.path)
    try:
        rows = store.zones.rows()
        engine = Engine(cfg, store)
        for zid in zones:
            fresh = engine.recompute(zid).state
            saved = rows[zid].state
            assert fresh is not None and saved is not None
            assert float(saved["time_ts"]) == fresh.time_ts
            np.testing.assert_allclose(saved["ub"], fresh.ub, rtol=1e-9, atol=1e-9 * np.abs(fresh.ub).max())
            np.testing.assert_allclose(saved["nc"], fresh.nc, rtol=1e-9, atol=1e-12 * fresh.nc.max())
    finally:
        store.close()
