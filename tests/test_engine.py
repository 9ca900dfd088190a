"""The engine against a real SQLite file: duplicates, late readings, ordering, gaps, restarts."""

import json
import random
import re
import subprocess
import sys

import numpy as np
import pytest

from tests.service_harness import write_secret
from watcher.config import config_from_dict
from watcher.engine.batch import Engine, Message
from watcher.store.db import Store

T0 = 1_795_000_000.0
NOW = T0 + 30 * 86400


def make(tmp_path, reorder=600.0, name="w.db", storage=None, ingest=None, zones=None):
    """A configuration, a real SQLite store and an engine in tmp_path."""
    write_secret(tmp_path / "pw", "x")
    cfg = config_from_dict(
        {
            "broker": {"password_file": str(tmp_path / "pw")},
            "storage": {"path": str(tmp_path / name), **(storage or {})},
            "ingest": {"reorder_window_s": reorder, "max_gap_s": 900.0, **(ingest or {})},
            "sites": [{"id": "kp"}],
            "zones": zones or [{"id": "bulk-a", "setpoint_c": -25.0}, {"id": "dispatch", "setpoint_c": -22.0}],
            "sources": [
                {
                    "pattern": "kp/{zone}/{sensor}/air",
                    "signal": "air_c",
                    "value": "t",
                    "time": "ts",
                    "time_format": "epoch_s",
                }
            ],
        },
        "test.toml",
    )
    store = Store(cfg.storage.path)
    return cfg, store, Engine(cfg, store, checkpoint_s=0.0)


def msg(zone, k, value=None, sensor="s1"):
    v = -25.0 + (5.0 if k % 240 < 30 else 0.0) if value is None else value
    return Message(f"kp/{zone}/{sensor}/air", json.dumps({"t": v, "ts": T0 + 60 * k}).encode(), NOW, k, 1)


def state_of(engine, zone="bulk-a"):
    return engine.runners[zone].state


def same_state(a, b):
    """Equal to 1e-9 relative (the service's contract): splitting the same readings into other
    chunks only changes the order of floating-point sums."""
    assert a.time_ts == b.time_ts
    np.testing.assert_allclose(a.ub, b.ub, rtol=1e-9, atol=1e-9 * np.abs(b.ub).max())
    # Weights to 1e-9 of the row's largest, like the boundaries: the lowest live cell's weight
    # is its share above u = 0, and a boundary that low (d ~ 5 um) carries ~2e-9 relative
    # rounding after a year of hourly steps, so a 1e-9 bound on that weight alone is noise.
    np.testing.assert_allclose(a.nc, b.nc, rtol=1e-9, atol=1e-9 * np.abs(b.nc).max())


def test_duplicates_are_dropped_by_natural_key(tmp_path):
    """The same reading twice (QoS 1 redelivery or a resend) is stored once and counted as a duplicate."""
    _, store, eng = make(tmp_path)
    first = eng.process([msg("bulk-a", k) for k in range(100)], NOW)
    again = eng.process([msg("bulk-a", k) for k in range(50, 150)], NOW)
    assert first.counts["accepted"] == 100
    assert again.counts == {"duplicate": 50, "accepted": 50}
    assert store.record.count("readings") == 150


def test_order_within_the_reorder_window_does_not_matter(tmp_path):
    """Readings shuffled within the reorder window give exactly the ordered result."""
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    _, _, ordered = make(tmp_path / "a")
    _, _, shuffled = make(tmp_path / "b")
    msgs = [msg("bulk-a", k) for k in range(2000)]
    for lo in range(0, 2000, 100):
        ordered.process(msgs[lo : lo + 100], NOW)
        chunk = msgs[lo : lo + 100]
        random.Random(lo).shuffle(chunk)
        shuffled.process(chunk, NOW)
    same_state(state_of(shuffled), state_of(ordered))


def test_late_reading_is_flagged_and_the_zone_recomputed(tmp_path):
    """A reading older than what the model has fed is stored flagged late, and the zone's state
    then equals a recomputation from all stored readings."""
    _, store, eng = make(tmp_path, reorder=60.0)
    msgs = [msg("bulk-a", k) for k in range(1000)]
    held_back = msgs.pop(400)
    eng.process(msgs, NOW)
    result = eng.process([held_back], NOW)
    assert result.counts == {"late": 1} and result.recomputed == {"bulk-a"}
    assert store.conn.execute("SELECT late FROM readings WHERE ts = ?", (T0 + 60 * 400,)).fetchone()[0] == 1
    same_state(state_of(eng), eng.recompute("bulk-a").state)
    # ... and it is the state an in-order delivery would have given
    (tmp_path / "c").mkdir()
    _, _, in_order = make(tmp_path / "c", reorder=60.0)
    in_order.process([msg("bulk-a", k) for k in range(1000)], NOW)
    same_state(state_of(eng), state_of(in_order))


def test_gap_is_recorded_and_air_held(tmp_path):
    """No air reading for longer than max_gap_s is stored as a data gap."""
    _, store, eng = make(tmp_path, reorder=0.0)
    eng.process([msg("bulk-a", k) for k in list(range(100)) + list(range(160, 200))], NOW)
    gaps = store.gaps.list("bulk-a")
    assert [(g[1], g[2]) for g in gaps] == [(T0 + 60 * 99, T0 + 60 * 160)]


def test_sensors_in_one_zone_are_averaged(tmp_path):
    """Two air sensors reporting at once feed their mean."""
    _, _, eng = make(tmp_path, reorder=0.0)
    eng.process(
        [
            msg("bulk-a", 0, -26.0, "s1"),
            msg("bulk-a", 0, -24.0, "s2"),
            msg("bulk-a", 1, -26.0, "s1"),
            msg("bulk-a", 1, -22.0, "s2"),
            msg("bulk-a", 2, -25.0, "s1"),
        ],
        NOW,
    )
    assert state_of(eng).air_c[0] == pytest.approx(-23.5)  # s1 -25 and s2 still -22 at minute 2


def test_restart_from_checkpoint_equals_uninterrupted(tmp_path):
    """A new engine on the same database (after a crash) continues exactly as one that never stopped."""
    cfg, store, eng = make(tmp_path)
    msgs = [msg("bulk-a", k) for k in range(3000)] + [msg("dispatch", k) for k in range(3000)]
    eng.process(msgs[:1500], NOW)
    eng.process(msgs[3000:4500], NOW)
    del eng  # the crash: only the database survives
    restarted = Engine(cfg, store, checkpoint_s=0.0)
    restarted.process(msgs[1500:3000] + msgs[4500:], NOW)
    (tmp_path / "u").mkdir()
    _, _, uninterrupted = make(tmp_path / "u")
    for lo in range(0, 6000, 1500):
        uninterrupted.process(msgs[lo : lo + 1500], NOW)
    for zone in ("bulk-a", "dispatch"):
        same_state(state_of(restarted, zone), state_of(uninterrupted, zone))
        same_state(state_of(restarted, zone), restarted.recompute(zone).state)


def test_failed_commit_stores_nothing_and_memory_follows_the_record(tmp_path):
    """When the transaction fails nothing is stored, the zone is reloaded from the database, and a
    retry of the same batch then gives the same state as if the failure never happened."""
    cfg, store, eng = make(tmp_path, reorder=0.0)
    eng.process([msg("bulk-a", k) for k in range(500)], NOW)
    store.conn.execute(
        "CREATE TRIGGER full BEFORE INSERT ON reading_rows WHEN NEW.value < -29 BEGIN SELECT RAISE(ABORT, 'disk full'); END"
    )
    batch = [msg("bulk-a", k) for k in range(500, 700)] + [msg("bulk-a", 700, -30.0)]
    with pytest.raises(Exception, match="disk full"):
        eng.process(batch, NOW)
    assert store.record.count("readings") == 500
    assert state_of(eng).time_ts == T0 + 60 * 499
    store.conn.execute("DROP TRIGGER full")
    eng.process(batch, NOW)
    (tmp_path / "d").mkdir()
    _, _, clean = make(tmp_path / "d", reorder=0.0)
    clean.process([msg("bulk-a", k) for k in range(700)] + [msg("bulk-a", 700, -30.0)], NOW)
    same_state(state_of(eng), state_of(clean))


def test_rejections_are_stored_with_reason_and_payload(tmp_path):
    """Bad messages are kept with topic, reason and a truncated payload; good ones still flow."""
    _, store, eng = make(tmp_path)
    bad = [
        Message("kp/bulk-a/s1/air", b"x" * 5000, NOW),
        Message("kp/unknown/s1/air", b'{"t": -20, "ts": 1795000000}', NOW),
        Message("elsewhere", b"1", NOW),
        Message("kp/bulk-a/s1/air", b"\xff", NOW),
    ]
    result = eng.process(bad + [msg("bulk-a", 1)], NOW)
    assert result.counts == {"rejected": 4, "accepted": 1}
    rows = store.conn.execute("SELECT topic, reason, length(payload) FROM rejections ORDER BY id").fetchall()
    assert rows[0][1].startswith("invalid JSON") and rows[0][2] == 512
    assert "unknown zone 'unknown'" in rows[1][1]
    assert "no source pattern" in rows[2][1]
    assert "not UTF-8" in rows[3][1]


def test_retention_folds_old_readings_and_keeps_recomputation_exact(tmp_path):
    """Raw readings older than raw_retention_days become hourly aggregates; the zone's anchor
    keeps recomputation exact, and a late reading after that still merges in order."""
    _, store, eng = make(
        tmp_path,
        reorder=0.0,
        name="r.db",
        storage={"raw_retention_days": 366},
        ingest={"past_limit_days": 366.0},
        zones=[{"id": "bulk-a", "setpoint_c": -25.0}],
    )
    hours = 400 * 24
    now = T0 + 3600 * hours
    # Each reading is received a few seconds after it was taken, as in the field.
    msgs = [
        Message(
            "kp/bulk-a/s1/air",
            json.dumps({"t": -25.0 + (4.0 if h % 24 == 3 else 0.0), "ts": T0 + 3600 * h}).encode(),
            T0 + 3600 * h + 5,
        )
        for h in range(hours)
    ]
    held = msgs.pop(hours - 100)  # will arrive late, after the retention step
    for lo in range(0, len(msgs), 2000):
        eng.process(msgs[lo : lo + 2000], now)
    total_before = store.readings.summary("bulk-a")[0]
    folded = eng.apply_retention(now)
    cutoff = now - 366 * 86400
    assert folded == sum(1 for h in range(hours) if T0 + 3600 * h <= cutoff)
    assert store.conn.execute("SELECT min(ts) FROM readings").fetchone()[0] > cutoff
    assert store.conn.execute("SELECT sum(n) FROM readings_hourly").fetchone()[0] == folded
    assert store.readings.summary("bulk-a")[0] == total_before  # every reading is still accounted for
    same_state(eng.recompute("bulk-a").state, state_of(eng))
    result = eng.process([Message(held.topic, held.payload, now)], now)
    assert result.counts == {"late": 1}
    (tmp_path / "full").mkdir()
    _, _, full = make(tmp_path / "full", reorder=0.0)
    full_msgs = msgs[: hours - 100] + [held] + msgs[hours - 100 :]
    for lo in range(0, len(full_msgs), 2000):
        full.process(full_msgs[lo : lo + 2000], now)
    same_state(state_of(eng), state_of(full))


def test_a_duplicate_with_another_value_is_recorded_not_only_counted(tmp_path):
    """The same sensor and time again with a different value: the first stays, the conflict is
    a rejection naming both values (it was only a metric before)."""
    _, store, eng = make(tmp_path)
    eng.process([msg("bulk-a", 1, value=-25.0)], NOW)
    again = eng.process([msg("bulk-a", 1, value=-19.5), msg("bulk-a", 1, value=-25.0)], NOW)
    assert again.counts["duplicate"] == 2 and again.rejections["conflicting_duplicate"] == 1
    (reason,) = [r[0] for r in store.conn.execute("SELECT reason FROM rejections")]
    assert "stored -25.0, got -19.5" in reason
    assert store.conn.execute("SELECT value FROM readings").fetchall() == [(-25.0,)]


def test_database_file_is_private_and_a_bad_path_is_a_clear_error(tmp_path):
    """A new database is created 0600 whatever the umask; a path that cannot be created is a StoreError, not a traceback."""
    import os
    import stat

    from watcher.errors import StoreError
    from watcher.store.db import Store

    old = os.umask(0o022)
    try:
        Store(str(tmp_path / "new.db")).close()
    finally:
        os.umask(old)
    assert stat.S_IMODE((tmp_path / "new.db").stat().st_mode) == 0o600
    with pytest.raises(StoreError, match="/proc/watcher.db: cannot open the database"):
        Store("/proc/watcher.db")


def test_figures_reach_the_last_reading_when_no_further_batch_comes(tmp_path):
    """Six buffered hours arrive in one batch and nothing after: the reorder window holds the
    last two minutes back, and once the zone has been quiet that long on the service's clock,
    settle() releases them, so the checkpoint (what `status` shows) reaches the last reading."""
    cfg, store, eng = make(tmp_path, reorder=120.0)
    eng.process([msg("bulk-a", k) for k in range(360)], NOW)
    last = T0 + 60 * 359
    assert store.zones.rows()["bulk-a"].figures["model_time_ts"] <= last - 120.0
    with store.atomic():
        eng.settle(NOW + 60.0)  # quiet for less than the window: still held
    assert store.zones.rows()["bulk-a"].figures["model_time_ts"] <= last - 120.0
    with store.atomic():
        eng.settle(NOW + 121.0)
    assert store.zones.rows()["bulk-a"].figures["model_time_ts"] == last
    # status says how old the data time is that the figures describe: here that of the last reading
    out = subprocess.run(
        [sys.executable, "-m", "watcher", "status", "--db", str(store.path)], capture_output=True, text=True, timeout=60
    )
    assert out.returncode == 0 and "figures of" in out.stdout, out.stdout + out.stderr
    ages = re.findall(r"([\d.]+ h ago)", next(x for x in out.stdout.splitlines() if x.startswith("bulk-a")))
    assert len(ages) == 2 and ages[0] == ages[1], out.stdout  # last reading, figures of
    # a site that reads Fahrenheit sees the zone's temperatures in F (-25 C is -13 F)
    toml = tmp_path / "f.toml"
    toml.write_text(
        f'[broker]\npassword_file = "{tmp_path / "pw"}"\n[storage]\npath = "{store.path}"\n'
        '[[sites]]\nid = "kp"\ntemp_unit = "F"\n[[zones]]\nid = "bulk-a"\nsetpoint_c = -25.0\n'
        '[[sources]]\npattern = "kp/{zone}/{sensor}/air"\nsignal = "air_c"\nvalue = "t"\n'
    )
    out = subprocess.run(
        [sys.executable, "-m", "watcher", "status", "--config", str(toml)], capture_output=True, text=True, timeout=60
    )
    assert out.returncode == 0 and "-13.0 F" in out.stdout, out.stdout + out.stderr
    late = eng.process([msg("bulk-a", 358, sensor="s2")], NOW + 200.0)  # a straggler after the release
    assert late.counts["late"] == 1  # stored, flagged, and the zone recomputed: nothing lost
    same_state(state_of(eng), eng.recompute("bulk-a").state)
