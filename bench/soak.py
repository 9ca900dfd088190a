"""A bounded soak: watcher under a steady stream for a fixed time, against a real local mosquitto.

Default: 20 minutes at ten times a busy site's rate (500 sensors at one reading per 6 s, times
ten = 833 readings a second), 50 zones of 10 sensors, readings stamped with the wall clock. A
publisher process paces QoS 1 messages; this process samples watcher every 10 s.
Prints the resident memory over time (service plus its network process; the slope after the
first 5 minutes should be flat), the acknowledgement latency p50/p99 (arrival at watcher to
the acknowledgement handed to the broker link, from watcher's own histogram, interpolated within
buckets), the peak queue depth, and published versus stored readings.
Usage: python bench/soak.py [--minutes 20] [--rate 833] [--sensors 500] [--json out.json]
"""

from __future__ import annotations

import argparse
import json
import multiprocessing as mp
import re
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from bench.service_ingest import config_text  # noqa: E402  (the same service settings)
from tests.broker import Broker  # noqa: E402
from tests.service_harness import WatcherProcess, readings_count  # noqa: E402

SENSORS_PER_ZONE = 10


def publisher(port: int, sensors: int, rate: float, seconds: float, counter) -> None:
    import paho.mqtt.client as mqtt

    c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="soak-pub", protocol=mqtt.MQTTv311)
    c.username_pw_set("sensor", "sensor-pw")
    c.max_inflight_messages_set(1000)
    c.connect("127.0.0.1", port)
    c.loop_start()
    start = time.time()
    n = 0
    while True:
        now = time.time()
        if now - start >= seconds:
            break
        due = int((now - start) * rate)
        while n < due:
            s = n % sensors
            zone, sensor = s // SENSORS_PER_ZONE, s % SENSORS_PER_ZONE
            # a reading per sensor every sensors/rate seconds; stamps unique per (sensor, ts)
            payload = json.dumps({"temp_c": -25.0 + 0.1 * ((n // sensors) % 7), "ts": round(now, 3) + 1e-4 * s})
            c.publish(f"kp/z{zone:04d}/s{sensor}/air", payload, qos=1)
            n += 1
        counter.value = n
        time.sleep(0.01)
    time.sleep(2.0)
    c.loop_stop()
    c.disconnect()
    counter.value = n


def rss_mb(pids: list[int]) -> float:
    total = 0
    for pid in pids:
        try:
            text = Path(f"/proc/{pid}/status").read_text()
            total += int(re.search(r"VmRSS:\s+(\d+)", text).group(1))
        except (OSError, AttributeError):
            pass
    return total / 1024


def histogram(text: str, name: str) -> list[tuple[float, float]]:
    out = []
    for line in text.splitlines():
        m = re.match(rf'{name}_bucket\{{le="([^"]+)"\}} (\S+)', line)
        if m:
            out.append((float(m.group(1)), float(m.group(2))))
    return out


def quantile(buckets: list[tuple[float, float]], q: float) -> float:
    """Linear interpolation inside the bucket that holds quantile q (Prometheus' method)."""
    total = buckets[-1][1]
    target, lo_bound, lo_count = q * total, 0.0, 0.0
    for bound, count in buckets:
        if count >= target:
            if bound == float("inf"):
                return lo_bound
            span = count - lo_count
            return lo_bound + (bound - lo_bound) * ((target - lo_count) / span if span else 1.0)
        lo_bound, lo_count = bound, count
    return float("nan")


def gauge(text: str, name: str) -> float:
    m = re.search(rf"^{name} (\S+)$", text, re.M)
    return float(m.group(1)) if m else float("nan")


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--minutes", type=float, default=20.0)
    ap.add_argument("--rate", type=float, default=500 / 6 * 10, help="readings per second")
    ap.add_argument("--sensors", type=int, default=500)
    ap.add_argument("--json", help="also write the figures here")
    args = ap.parse_args()
    seconds = args.minutes * 60
    zones = (args.sensors + SENSORS_PER_ZONE - 1) // SENSORS_PER_ZONE
    with tempfile.TemporaryDirectory(prefix="watcher-soak-") as tmp:
        folder = Path(tmp)
        broker = Broker(folder)
        broker.start()
        cfg = folder / "soak.toml"
        cfg.write_text(config_text(folder, broker, zones, "watcher-soak"))
        w = WatcherProcess(cfg)
        w.wait_ready(60)
        counter = mp.Value("q", 0)
        pub = mp.Process(target=publisher, args=(broker.port, args.sensors, args.rate, seconds, counter))
        start = time.time()
        pub.start()
        samples = []
        while pub.is_alive():
            time.sleep(10.0)
            status, body = w.get("/metrics")
            text = body.decode()
            sample = {
                "t_min": (time.time() - start) / 60,
                "rss_mb": rss_mb([w.proc.pid, *w.children()]),
                "queue": gauge(text, "watcher_queue_depth"),
                "published": counter.value,
            }
            samples.append(sample)
            print(
                f"{sample['t_min']:5.1f} min  rss {sample['rss_mb']:6.1f} MB  queue {sample['queue']:6.0f}  "
                f"published {sample['published']:,}",
                flush=True,
            )
        pub.join()
        deadline = time.time() + 120
        while readings_count(folder / "watcher-soak.db") < counter.value and time.time() < deadline:
            time.sleep(0.5)
        text = w.get("/metrics")[1].decode()
        stored = readings_count(folder / "watcher-soak.db")
        w.stop()
        broker.stop()
    buckets = histogram(text, "watcher_ack_seconds")
    late = [s for s in samples if s["t_min"] >= 5.0]
    slope = float("nan")
    if len(late) >= 2:
        import numpy as np

        slope = float(np.polyfit([s["t_min"] / 60 for s in late], [s["rss_mb"] for s in late], 1)[0])
    figures = {
        "minutes": args.minutes,
        "rate_per_s": args.rate,
        "published": counter.value,
        "stored": stored,
        "rss_mb_first": samples[0]["rss_mb"] if samples else None,
        "rss_mb_last": samples[-1]["rss_mb"] if samples else None,
        "rss_mb_max": max(s["rss_mb"] for s in samples) if samples else None,
        "rss_slope_mb_per_h_after_5min": slope,
        "ack_p50_s": quantile(buckets, 0.5),
        "ack_p99_s": quantile(buckets, 0.99),
        "queue_peak": gauge(text, "watcher_queue_depth_peak"),
        "samples": samples,
    }
    print(
        f"\nsoak {args.minutes:g} min at {args.rate:.0f} readings/s: published {figures['published']:,}, stored "
        f"{stored:,} (lost {figures['published'] - stored}); RSS {figures['rss_mb_first']:.0f} -> "
        f"{figures['rss_mb_last']:.0f} MB (max {figures['rss_mb_max']:.0f}, slope after 5 min {slope:+.1f} MB/h); "
        f"ack latency p50 {figures['ack_p50_s'] * 1000:.0f} ms, p99 {figures['ack_p99_s'] * 1000:.0f} ms; "
        f"peak queue {figures['queue_peak']:.0f}"
    )
    if args.json:
        Path(args.json).write_text(json.dumps(figures, indent=1))
    return 0 if stored >= figures["published"] else 1


if __name__ == "__main__":
    sys.exit(main())
