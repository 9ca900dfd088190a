"""Benchmarks of the service against a real local mosquitto (started here on loopback).

1. backlog: readings queued at the broker while watcher is down (default: one day of a
   500-sensor site at one reading a minute = 720,000), then drained after it starts.
2. watcher (parse, store, commit with synchronous=FULL, feed the model, then acknowledge)
   against a bare paho subscriber that only counts, both draining the same queued backlog
   from the same broker in the same run (ratio reported). Draining a queue measures the
   consumer; a live publisher on this 2-core machine would measure the publisher instead.
3. memory: resident set of a watcher with 1,000 zones after an hour of readings each.
Usage: python bench/service_ingest.py [--sensors 500] [--minutes 1440] [--zones-mem 1000]
"""

from __future__ import annotations

import argparse
import json
import multiprocessing as mp
import sqlite3
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

import paho.mqtt.client as mqtt  # noqa: E402

from tests.broker import Broker, free_port  # noqa: E402
from tests.service_harness import AIR_SOURCE_TOML, WatcherProcess  # noqa: E402

T0 = 1_795_000_000.0


def config_text(folder: Path, broker: Broker, zones: int, client_id: str) -> str:
    zone_blocks = "".join(f'[[zones]]\nid = "z{i:04d}"\nsetpoint_c = -25.0\n' for i in range(zones))
    return f"""
[broker]
port = {broker.port}
client_id = "{client_id}"
username = "{broker.USER}"
password_file = "{folder / "watcher-password"}"
receive_maximum = 20000
[storage]
path = "{folder / (client_id + ".db")}"
[ingest]
reorder_window_s = 120.0
batch_max = 2000
[health]
port = {free_port()}
[reports]
enabled = false
[[sites]]
id = "kp"
{zone_blocks}
{AIR_SOURCE_TOML}"""


def _publish_part(port: int, part: int, parts: int, sensors: int, minutes: int, zones: int) -> None:
    c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"bench-pub-{part}", protocol=mqtt.MQTTv311)
    c.username_pw_set("sensor", "sensor-pw")
    c.max_inflight_messages_set(2000)
    c.connect("127.0.0.1", port)
    c.loop_start()
    infos = []
    for k in range(minutes):
        for s in range(part, sensors, parts):
            payload = json.dumps({"temp_c": -25.0 + 0.01 * (s % 7), "ts": T0 + 60 * k}).encode()
            infos.append(c.publish(f"kp/z{s % zones:04d}/s{s}/air", payload, qos=1))
            if len(infos) >= 10000:  # cap what is unconfirmed (16-bit message ids)
                for i in infos:
                    i.wait_for_publish(60)
                infos = []
    for i in infos:
        i.wait_for_publish(60)
    c.loop_stop()
    c.disconnect()


def publish(broker: Broker, sensors: int, minutes: int, zones: int, parts: int = 2) -> float:
    start = time.perf_counter()
    procs = [
        mp.Process(target=_publish_part, args=(broker.port, p, parts, sensors, minutes, zones)) for p in range(parts)
    ]
    for p in procs:
        p.start()
    for p in procs:
        p.join()
    return time.perf_counter() - start


def db_count(path: Path) -> int:
    try:
        conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=5)
        try:
            return conn.execute("SELECT count(*) FROM readings").fetchone()[0]
        finally:
            conn.close()
    except sqlite3.Error:
        return 0


def wait_count(path: Path, n: int, timeout: float, proc=None) -> float:
    start = time.perf_counter()
    while time.perf_counter() - start < timeout:
        if proc is not None and proc.proc.poll() is not None:
            raise SystemExit("watcher exited:\n" + proc.log.read_text()[-2000:])
        if db_count(path) >= n:
            return time.perf_counter() - start
        time.sleep(0.2)
    raise SystemExit(f"only {db_count(path)} of {n} readings stored after {timeout} s")


def bare_drain_rate(broker: Broker, sensors: int, minutes: int, zones: int) -> float:
    """A bare paho subscriber (MQTT 5, persistent session, QoS 1, automatic acks) that only
    counts: the rate at which it drains the same kind of queued backlog."""
    from paho.mqtt.packettypes import PacketTypes
    from paho.mqtt.properties import Properties

    n = sensors * minutes

    def client():
        c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="bench-bare", protocol=mqtt.MQTTv5)
        c.username_pw_set(broker.USER, broker.PASSWORD)
        props = Properties(PacketTypes.CONNECT)
        props.SessionExpiryInterval = 3600
        props.ReceiveMaximum = 5000
        c.connect("127.0.0.1", broker.port, clean_start=False, properties=props)
        return c

    c = client()
    c.subscribe("kp/+/+/air", qos=1)
    for _ in range(20):
        c.loop(0.05)
    c.disconnect()
    publish(broker, sensors, minutes, zones)
    got = {"n": 0, "last": 0.0}

    def on_message(cl, ud, m):
        got["n"] += 1
        got["last"] = time.perf_counter()

    c = client()
    c.on_message = on_message
    start = time.perf_counter()
    while got["n"] < n and time.perf_counter() - start < 600:
        c.loop(0.01)
    c.disconnect()
    return got["n"] / (got["last"] - start)


def rss_mb(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sensors", type=int, default=500)
    ap.add_argument("--minutes", type=int, default=1440)
    ap.add_argument("--zones", type=int, default=100)
    ap.add_argument("--zones-mem", type=int, default=1000)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        broker = Broker(folder)
        broker.start()
        try:
            # 1. backlog
            cfg = folder / "backlog.toml"
            cfg.write_text(config_text(folder, broker, args.zones, "bench-backlog"))
            w = WatcherProcess(cfg)
            w.wait_ready()
            w.stop()  # the session (and its subscription) stays at the broker
            n = args.sensors * args.minutes
            secs_pub = publish(broker, args.sensors, args.minutes, args.zones)
            print(f"backlog: {n:,} readings queued at the broker in {secs_pub:.1f} s")
            start = time.perf_counter()
            w = WatcherProcess(cfg)
            drain = wait_count(folder / "bench-backlog.db", n, 600, w)
            total = time.perf_counter() - start
            print(
                f"backlog: drained {n:,} readings in {drain:.1f} s from process start "
                f"({n / drain:,.0f} readings/s, durable acks, WAL synchronous=FULL); target < 60 s"
            )
            w.stop()
            # 2. the same drain by a bare subscriber that only counts
            bare = bare_drain_rate(broker, args.sensors, args.minutes, args.zones)
            print(
                f"bare paho subscriber (MQTT 5, QoS 1, counts only): {bare:,.0f} msg/s; "
                f"watcher/bare ratio {n / drain / bare:.2f} (target >= 0.5)"
            )
            # 3. memory with many zones
            cfg3 = folder / "mem.toml"
            cfg3.write_text(config_text(folder, broker, args.zones_mem, "bench-mem"))
            w = WatcherProcess(cfg3)
            w.wait_ready()
            publish(broker, args.zones_mem, 60, args.zones_mem)
            wait_count(folder / "bench-mem.db", args.zones_mem * 60, 600)
            time.sleep(11)  # one checkpoint round: every zone fed and its figures computed
            parent, child = rss_mb(w.proc.pid), sum(rss_mb(k) for k in w.children())
            print(
                f"memory: {args.zones_mem} zones after an hour of 1-min readings each: resident set {parent:.0f} MB (service) "
                f"+ {child:.0f} MB (MQTT network process) = {parent + child:.0f} MB (target < 200 MB)"
            )
            w.stop()
            _ = total
        finally:
            broker.stop()


if __name__ == "__main__":
    main()
