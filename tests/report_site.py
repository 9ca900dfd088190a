"""A fictional site's recorded week, played through the real engine into a real SQLite file.

Invented data for tests (the "Kestrel Point" demo site): bulk-a has signalled defrosts every
8 h, door openings in working hours, a 3-hour refrigeration fault and a 2-hour sensor outage;
dispatch holds its setpoint all week (a zone with no events).
"""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

from tests.service_harness import write_secret
from watcher.config import config_from_dict
from watcher.engine.batch import Engine, Message
from watcher.store.db import Store

UTC = dt.UTC


def ts(y, mo, d, h=0, mi=0) -> float:
    return dt.datetime(y, mo, d, h, mi, tzinfo=UTC).timestamp()


def site_config(folder: Path, tz: str = "Europe/London"):
    write_secret(folder / "pw", "x")
    return config_from_dict(
        {
            "broker": {"password_file": str(folder / "pw")},
            "storage": {"path": str(folder / "w.db")},
            "ingest": {"reorder_window_s": 0.0, "max_gap_s": 900.0},
            "sites": [{"id": "kestrel", "name": "Kestrel Point Frozen Distribution, Unit 4", "timezone": tz}],
            "zones": [
                {"id": "bulk-a", "name": "Bulk store A", "setpoint_c": -25.0},
                {"id": "dispatch", "name": "Dispatch freezer", "setpoint_c": -22.0},
            ],
            "sources": [
                {
                    "pattern": "kp/{zone}/{sensor}/air",
                    "signal": "air_c",
                    "value": "t",
                    "time": "ts",
                    "time_format": "epoch_s",
                },
                {
                    "pattern": "kp/{zone}/{sensor}/door",
                    "signal": "door",
                    "value": "open",
                    "time": "ts",
                    "time_format": "epoch_s",
                },
                {
                    "pattern": "kp/{zone}/{sensor}/defrost",
                    "signal": "defrost",
                    "value": "on",
                    "time": "ts",
                    "time_format": "epoch_s",
                },
            ],
            "alerts": {
                "repeat_min": 120,
                "disable": ["sensor-stale", "broker-down", "rejections", "undelivered", "storage-failing"],
            },
            "reports": {"dir": str(folder / "reports")},
        },
        "kestrel.toml",
    )


def bulk_air(t: float, start: float, fault: tuple[float, float]) -> float:
    if fault[0] <= t < fault[1]:
        return -16.0
    m = ((t - start) / 60.0) % 480  # a 30-min defrost every 8 h, ramping to +7 K and back
    return -25.0 + (7.0 * (1.0 - abs(m - 15) / 15.0) if m < 30 else 0.0)


def play_site(
    folder: Path,
    start: float,
    days: float,
    fault: tuple[float, float],
    outage: tuple[float, float],
    tz="Europe/London",
    store: Store | None = None,
):
    """Returns (config, store). Readings a minute apart; received 'now' (the test's clock).
    The record is the configuration's file unless a store is given (another engine)."""
    cfg = site_config(folder, tz)
    store = store or Store(cfg.storage.path)
    engine = Engine(cfg, store, checkpoint_s=0.0)
    received = start + days * 86400.0 + 3600.0
    batch: list[Message] = []

    def add(topic, payload):
        batch.append(Message(topic, json.dumps(payload).encode(), received, 0, 1))

    n = int(days * 1440)
    for k in range(n):
        t = start + 60.0 * k
        if not (outage[0] <= t < outage[1]):
            add("kp/bulk-a/s1/air", {"t": round(bulk_air(t, start, fault), 3), "ts": t})
        add("kp/dispatch/s1/air", {"t": -22.0, "ts": t})
        m = ((t - start) / 60.0) % 480
        if m in (0, 30):
            add("kp/bulk-a/evap1/defrost", {"on": int(m == 0), "ts": t})
        hour = dt.datetime.fromtimestamp(t, UTC).hour
        if 8 <= hour < 17 and k % 97 == 0:  # a door opening now and then in working hours
            add("kp/bulk-a/dock/door", {"open": 1, "ts": t})
            add("kp/bulk-a/dock/door", {"open": 0, "ts": t + 120.0 + 60.0 * (k % 5)})
        if len(batch) >= 360:
            engine.process(batch, now=received)
            batch = []
    batch.append(Message("kp/bulk-a/s1/air", b"{not json", received, 0, 1))  # one rejected message
    engine.process(batch, now=received)
    engine.checkpoint_all(received)
    return cfg, store
