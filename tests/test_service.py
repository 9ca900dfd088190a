"""The service against a real mosquitto and real processes: end to end, restarts, signals."""

from __future__ import annotations

import json
import re
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import paho.mqtt.client as mqtt
import pytest
from prometheus_client.parser import text_string_to_metric_families

from tests.broker import Broker
from tests.service_harness import (
    T0,
    Publisher,
    WatcherProcess,
    air_value,
    assert_state_equals_recomputation,
    messages,
    readings_count,
    wait_for,
    write_config,
)
from watcher.config import load_config
from watcher.files.series import Series
from watcher.health import ZONE_FIGURES
from watcher.simulation import simulate

ROOT = Path(__file__).resolve().parent.parent
ZONES = ("bulk-a", "dispatch")


def start_watcher(tmp_path, broker, **config_kw):
    """Write a configuration, start `watcher run`, wait until it is ready, open a publisher."""
    config = write_config(tmp_path, broker, **config_kw)
    w = WatcherProcess(config)
    w.wait_ready()
    return config, w, Publisher(broker)


def status_json(config) -> dict:
    out = subprocess.run(
        [sys.executable, "-m", "watcher", "status", "--config", str(config), "--json"],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert out.returncode == 0, out.stderr
    return json.loads(out.stdout)


def test_end_to_end_status_matches_simulate(tmp_path, broker):
    """Publish readings -> `watcher run` -> `watcher status --json` shows the state `watcher simulate` computes."""
    config, w, pub = start_watcher(tmp_path, broker, reorder_s=60.0)
    n = 2 * 1440
    pub.send(messages(ZONES, 0, n))
    pub.send(
        [
            ("kp/bulk-a/door", b"1"),
            ("kp/bulk-a/door", b"0"),
            ("kp/nowhere/s1/air", b"{}"),
            ("kp/bulk-a/s1/air", b"not json"),
        ]
    )
    wait_for(lambda: readings_count(tmp_path / "watcher.db") >= 2 * n + 2, what="all readings stored")
    assert w.stop() == 0
    report = status_json(config)
    assert report["rejections_total"] == 2
    for i, z in enumerate(report["zones"]):
        assert z["readings_total"] == n + (2 if z["id"] == "bulk-a" else 0)
        fed = [k for k in range(n) if T0 + 60 * k <= z["model_time_ts"]]
        assert len(fed) == n - 1  # the newest minute still waits in the 60-s reorder window
        ts = np.array([T0 + 60 * k for k in fed])
        air = np.array([air_value(i, k) for k in fed])
        expected = simulate(load_config(str(config)).zones[i].profile, Series(ts, air, None), -25.0)
        assert z["budget_used_pct"] == pytest.approx(expected["budget_used_pct"], rel=1e-9)
        assert z["mean_diameter_um"] == pytest.approx(expected["mean_diameter_um"], rel=1e-9)
        assert z["air_c"] == air_value(i, n - 1)
    assert_state_equals_recomputation(config)
    pub.close()


def test_broker_restart_mid_stream_loses_nothing(tmp_path, broker):
    """The broker stops and starts again (persistence on) in mid-stream; watcher reconnects and
    every reading published before and after arrives."""
    config, w, pub = start_watcher(tmp_path, broker, reorder_s=0.0)
    pub.send(messages(ZONES, 0, 300))
    broker.stop()
    time.sleep(0.5)
    broker.start()
    wait_for(pub.client.is_connected, timeout=30, what="the sensors' publisher to reconnect")
    pub.send(messages(ZONES, 300, 300))
    wait_for(lambda: readings_count(tmp_path / "watcher.db") == 2 * 600, what="readings from both sides of the restart")
    wait_for(lambda: w.get("/readyz")[0] == 200, what="watcher connected again")
    assert "connected" in w.log.read_text().split("disconnected")[-1]
    assert w.stop() == 0
    assert_state_equals_recomputation(config)
    pub.close()


def test_readings_sent_while_watcher_is_down_arrive_after_restart(tmp_path, broker):
    """The persistent session keeps QoS 1 readings queued at the broker while watcher is stopped."""
    config, w, pub = start_watcher(tmp_path, broker, reorder_s=0.0)
    pub.send(messages(ZONES, 0, 100))
    wait_for(lambda: readings_count(tmp_path / "watcher.db") == 200, what="first readings")
    assert w.stop() == 0
    pub.send(messages(ZONES, 100, 400))  # nobody is listening now
    w = WatcherProcess(config)
    w.wait_ready()
    wait_for(lambda: readings_count(tmp_path / "watcher.db") == 1000, what="queued readings")
    assert w.stop() == 0
    pub.close()


def retained_status(broker: Broker) -> str:
    got = []
    c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="status-reader", protocol=mqtt.MQTTv311)
    c.username_pw_set("sensor", "sensor-pw")
    c.on_message = lambda cl, ud, m: got.append(m.payload.decode())
    c.connect("127.0.0.1", broker.port)
    c.subscribe("watcher/status", qos=1)
    c.loop_start()
    wait_for(lambda: got, timeout=10, what="retained status")
    c.loop_stop()
    c.disconnect()
    return got[0]


def test_tls_health_metrics_and_status_topic(tmp_path, broker):
    """Over TLS with a test CA and a password: ready, /healthz and /metrics answer, the retained
    status says online while running and offline after SIGTERM."""
    config = write_config(tmp_path, broker, tls=True, reorder_s=0.0)
    w = WatcherProcess(config)
    w.wait_ready()
    assert retained_status(broker) == "online"
    Publisher(broker).send(messages(ZONES, 0, 50) + [("kp/bulk-a/s1/air", b"{oops")])
    wait_for(lambda: readings_count(tmp_path / "watcher.db") == 100, what="readings over TLS")
    code, body = w.get("/healthz")
    assert code == 200 and json.loads(body)["threads"] == {"writer": True, "mqtt": True, "deliverer": True}
    wait_for(lambda: b"invalid_JSON" in w.get("/metrics")[1], timeout=20, what="the rejection in the metrics")
    code, body = w.get("/metrics")
    text = body.decode()
    assert code == 200
    assert 'watcher_readings_total{result="accepted"} 100.0' in text
    assert 'watcher_rejections_total{reason="invalid_JSON"} 1.0' in text
    assert "watcher_commit_seconds_bucket" in text and "watcher_queue_depth" in text
    # Every zone gauge, read with prometheus-client's own parser, once the figures exist.
    wait_for(lambda: b"watcher_zone_product_celsius{" in w.get("/metrics")[1], timeout=30, what="zone figures")
    families = {f.name: f for f in text_string_to_metric_families(w.get("/metrics")[1].decode())}
    wanted = ["watcher_zone_last_reading_age_seconds", "watcher_zone_air_celsius"] + [g[0] for g in ZONE_FIGURES]
    for name in wanted:
        assert families[name].type == "gauge", name
        assert {s.labels["zone"] for s in families[name].samples} == set(ZONES), name
    air = {s.labels["zone"]: s.value for s in families["watcher_zone_air_celsius"].samples}
    assert air == {z: air_value(i, 49) for i, z in enumerate(ZONES)}  # the newest reading of each zone
    product = {s.labels["zone"]: s.value for s in families["watcher_zone_product_celsius"].samples}
    assert all(-26.0 < v < -18.0 for v in product.values()), product
    size = [s.value for s in families["watcher_zone_mean_crystal_diameter_meters"].samples]
    assert all(20e-6 < v < 60e-6 for v in size), size  # micrometre-sized crystals, in metres
    alerts = {s.labels["severity"]: s.value for s in families["watcher_open_alerts"].samples}
    assert set(alerts) == {"info", "warning", "critical"}
    # The shipped dashboard queries only what /metrics exposes.
    exposed = {s.name for f in families.values() for s in f.samples}
    queried = set(re.findall(r"\bwatcher_[a-z0-9_]+", (ROOT / "deploy/grafana/watcher-zones.json").read_text()))
    assert len(queried) >= 8 and queried <= exposed, queried - exposed
    assert w.stop() == 0
    assert retained_status(broker) == "offline"


def test_wrong_password_keeps_running_and_says_why(tmp_path, broker):
    """A refused login does not crash the service: /healthz stays 200, /readyz is 503 with the reason."""
    config = write_config(tmp_path, broker)
    (tmp_path / "watcher-password").write_text("wrong\n")
    w = WatcherProcess(config)
    wait_for(
        lambda: w.get("/readyz")[0] == 503 and json.loads(w.get("/readyz")[1])["broker_error"],
        timeout=30,
        what="refusal",
    )
    detail = json.loads(w.get("/readyz")[1])
    assert "refused" in detail["broker_error"] and detail["database"] is True
    assert w.get("/healthz")[0] == 200
    assert w.proc.poll() is None
    assert w.stop() == 0


def test_sighup_swaps_a_valid_config_and_keeps_the_old_on_error(tmp_path, broker):
    """SIGHUP with a broken file keeps the running configuration; a valid one with a new zone is swapped in."""
    config = write_config(tmp_path, broker, reorder_s=0.0)
    w = WatcherProcess(config)
    w.wait_ready()
    good = config.read_text()
    config.write_text(good.replace("reorder_window_s", "reorder_window_seconds"))
    w.proc.send_signal(signal.SIGHUP)
    wait_for(lambda: "reload refused" in w.log.read_text(), timeout=20, what="refused reload")
    assert "reorder_window_seconds" in w.log.read_text()
    pub = Publisher(broker)
    pub.send(messages(["bulk-a"], 0, 10) + messages(["cold-2"], 0, 10))
    wait_for(lambda: readings_count(tmp_path / "watcher.db") == 10, what="bulk-a readings")
    config.write_text(good + '\n[[zones]]\nid = "cold-2"\nsetpoint_c = -28.0\n')
    w.proc.send_signal(signal.SIGHUP)
    wait_for(lambda: "configuration swapped (3 zones" in w.log.read_text(), timeout=20, what="swap")
    pub.send(messages(["cold-2"], 10, 10))
    wait_for(lambda: readings_count(tmp_path / "watcher.db") == 20, what="cold-2 readings after reload")
    assert w.proc.poll() is None
    assert w.stop() == 0
    pub.close()


def test_a_notify_socket_nobody_reads_never_blocks_the_service(tmp_path, broker):
    """The notify socket's queue fills (nobody reads it): watchdog pings are dropped with a
    warning and SIGTERM still stops the service at once (the main thread once blocked there)."""
    sock_path = tmp_path / "notify.sock"
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(str(sock_path))
    w = WatcherProcess(write_config(tmp_path, broker), env={"NOTIFY_SOCKET": str(sock_path), "WATCHDOG_USEC": "100000"})
    w.wait_ready()
    wait_for(lambda: "notify socket is full" in w.log.read_text(), timeout=30, what="a full notify socket")
    started = time.monotonic()
    assert w.stop(timeout=30) == 0
    assert time.monotonic() - started < 15
    sock.close()


def test_systemd_notifications(tmp_path, broker):
    """With NOTIFY_SOCKET set: READY=1 once up, WATCHDOG=1 while threads live, STOPPING=1 on SIGTERM."""
    sock_path = tmp_path / "notify.sock"
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(str(sock_path))
    sock.settimeout(0.2)
    config = write_config(tmp_path, broker)
    w = WatcherProcess(config, env={"NOTIFY_SOCKET": str(sock_path), "WATCHDOG_USEC": "400000"})
    got: list[str] = []

    def drain():
        try:
            while True:
                got.append(sock.recv(256).decode())
        except OSError:
            pass
        return got

    wait_for(
        lambda: "READY=1" in drain() and drain().count("WATCHDOG=1") >= 3, timeout=30, what="READY and watchdog pings"
    )
    assert w.stop() == 0
    wait_for(lambda: "STOPPING=1" in drain(), timeout=10, what="STOPPING")
    sock.close()
