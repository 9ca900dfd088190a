"""The service against a real mosquitto and real processes: end to end, restarts, signals."""

from __future__ import annotations

import json
import random
import subprocess
import sys
import time

import numpy as np
import pytest

from tests.broker import Broker
from tests.service_harness import (
    RUNNING,
    T0,
    Publisher,
    WatcherProcess,
    air_value,
    messages,
    readings_count,
    wait_for,
    write_config,
)
from watcher.config import load_config
from watcher.engine.batch import Engine
from watcher.files.series import Series
from watcher.simulation import simulate
from watcher.store.db import Store

ZONES = ("bulk-a", "dispatch")


@pytest.fixture()
def broker(tmp_path):
    b = Broker(tmp_path)
    b.start()
    yield b
    for proc in RUNNING:  # never leave a watcher behind, whatever the test did
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)
    RUNNING.clear()
    b.stop()


def status_json(config) -> dict:
    out = subprocess.run(
        [sys.executable, "-m", "watcher", "status", "--config", str(config), "--json"],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert out.returncode == 0, out.stderr
    return json.loads(out.stdout)


def assert_state_equals_recomputation(config_path) -> None:
    """Each zone's stored state equals a full recomputation from its stored readings (1e-9)."""
    cfg = load_config(str(config_path))
    store = Store(cfg.storage.path)
    try:
        rows = store.zone_rows()
        engine = Engine(cfg, store)
        for zid in ZONES:
            fresh = engine.recompute(zid).state
            saved = rows[zid].state
            assert fresh is not None and saved is not None
            assert float(saved["t_s"]) == fresh.t_s
            np.testing.assert_allclose(saved["ub"], fresh.ub, rtol=1e-9, atol=1e-9 * np.abs(fresh.ub).max())
            np.testing.assert_allclose(saved["nc"], fresh.nc, rtol=1e-9, atol=1e-12 * fresh.nc.max())
    finally:
        store.close()


def test_end_to_end_status_matches_simulate(tmp_path, broker):
    """Publish readings -> `watcher run` -> `watcher status --json` shows the state `watcher simulate` computes."""
    config = write_config(tmp_path, broker, reorder_s=60.0)
    w = WatcherProcess(config)
    w.wait_ready()
    pub = Publisher(broker)
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
        fed = [k for k in range(n) if T0 + 60 * k <= z["model_time_s"]]
        assert len(fed) == n - 1  # the newest minute still waits in the 60-s reorder window
        ts = np.array([T0 + 60 * k for k in fed])
        air = np.array([air_value(i, k) for k in fed])
        expected = simulate(load_config(str(config)).zones[i].profile, Series(ts, air, None), -25.0)
        assert z["budget_used_pct"] == pytest.approx(expected["budget_used_pct"], rel=1e-9)
        assert z["mean_diameter_um"] == pytest.approx(expected["mean_diameter_um"], rel=1e-9)
        assert z["air_c"] == air_value(i, n - 1)
    assert_state_equals_recomputation(config)
    pub.close()


def test_sigkill_at_random_moments_loses_no_acknowledged_reading(tmp_path, broker):
    """20 real SIGKILLs while readings stream in: every published reading ends up stored once,
    and each zone's state equals a full recomputation from the stored readings."""
    config = write_config(tmp_path, broker, reorder_s=0.0)
    pub = Publisher(broker)
    rng = random.Random(20261201)
    per_round = 240
    sent = 0
    w = WatcherProcess(config)
    w.wait_ready()
    for _ in range(20):
        pub.send(messages(ZONES, sent, per_round))
        sent += per_round
        time.sleep(rng.uniform(0.0, 0.6))  # kill at a random moment of the ingest
        w.kill()
        w = WatcherProcess(config)
        w.wait_ready()
    wait_for(
        lambda: readings_count(tmp_path / "watcher.db") == len(ZONES) * sent, timeout=120, what="every reading stored"
    )
    assert w.stop() == 0
    assert readings_count(tmp_path / "watcher.db") == len(ZONES) * sent
    assert_state_equals_recomputation(config)
    pub.close()
