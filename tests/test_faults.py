"""Faults and abuse: nothing acknowledged is lost, nothing bad gets in, the service stays up.

The scenarios (tests/faults.py) run against real processes; here with small counts, in
bench/fault_harness.py with full counts (it writes docs/reliability.md). The parser properties
are fuzzed with hypothesis; the clock cases use an injected clock on the engine.
"""

from __future__ import annotations

import contextlib
import json
import math
import random
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests import faults
from tests.abuse import HELD, REASONS, corpus
from tests.broker import make_ca
from tests.receivers import Receiver
from tests.service_harness import (
    AIR_ALERT_AT_ONCE_TOML,
    Publisher,
    WatcherProcess,
    channel_toml,
    messages,
    readings_count,
    wait_for,
    write_config,
)
from tests.test_monitor import make
from watcher.engine.batch import Engine, Message
from watcher.engine.held import readmit
from watcher.ingest.payload import Limits, Rejected, Source, parse_message
from watcher.ingest.topics import parse_pattern
from watcher.store import chain

NOW = 1_795_000_000.0
LIMITS = Limits()
AIR = Source(
    parse_pattern("kp/{zone}/{sensor}/air"), "air_c", value_path=("t",), time_path=("ts",), time_format="epoch_s"
)
TAGGED = Source(
    parse_pattern("kp/{zone}/{sensor}/tagged"),
    "air_c",
    value_path=("v",),
    unit_path=("unit",),
    time_path=("ts",),
    time_format="epoch_s",
)
DOOR = Source(parse_pattern("kp/{zone}/door"), "door", fmt="number")


def check_outcome(outcome: faults.Outcome) -> None:
    print(f"\n{outcome.name}: tried {outcome.tried}; {outcome.observed}; lost {outcome.lost}; {outcome.recovery()}")
    assert outcome.lost == 0, outcome


# --- the parser, fuzzed ----------------------------------------------------------------------------

json_values = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats() | st.text(max_size=20),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner, max_size=4),
    max_leaves=20,
)


def _valid_or_rejected(source: Source, payload: bytes) -> None:
    try:
        r = parse_message(source, {"zone": "bulk-a", "sensor": "s1"}, payload, NOW, LIMITS)
    except Rejected as exc:
        assert str(exc)  # every rejection has a reason
        return
    assert math.isfinite(r.value) and math.isfinite(r.ts)
    assert NOW - LIMITS.past_limit_s <= r.ts <= NOW + LIMITS.future_skew_s
    if source.signal == "air_c":
        assert LIMITS.temp_range_c[0] <= r.value <= LIMITS.temp_range_c[1]
    else:
        assert r.value in (0.0, 1.0)


@settings(max_examples=600, deadline=None)
@given(st.binary(max_size=300))
def test_any_bytes_become_a_reading_or_a_reasoned_rejection(payload):
    """Any payload bytes give a plausible reading or a rejection with a reason, never another exception."""
    for source in (AIR, TAGGED, DOOR):
        _valid_or_rejected(source, payload)


@settings(max_examples=600, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(value=json_values, ts=json_values, unit=json_values, extra=st.dictionaries(st.text(max_size=5), json_values))
def test_any_json_document_becomes_a_reading_or_a_reasoned_rejection(value, ts, unit, extra):
    """Any JSON document gives a plausible reading or a rejection with a reason, never another exception."""
    for doc in ({**extra, "t": value, "ts": ts}, {"v": value, "unit": unit, "ts": NOW}, value):
        text = json.dumps(doc, allow_nan=True).encode()
        _valid_or_rejected(AIR, text)
        _valid_or_rejected(TAGGED, text)


@settings(max_examples=400, deadline=None)
@given(st.text(max_size=60))
def test_topics_with_wildcards_or_control_characters_never_match(topic):
    """A topic with wildcards or control characters never yields zone or sensor names."""
    names = AIR.pattern.match(topic)
    if names is not None:
        assert all(
            v and not set(v) & set("+#/") and all(ord(c) >= 32 and ord(c) != 127 for c in v) for v in names.values()
        )


def test_each_bad_class_is_rejected_with_its_reason_in_process(tmp_path):
    """The same generated corpus the broker run uses, straight into the engine: every class
    rejected with the words its reason must hold; topics the broker itself refuses (control
    characters, wildcards) are refused here too. (Every rejection stored one by one: the rate
    limit per topic is off here and tested on its own.)"""
    cfg, store, engine = make(
        tmp_path,
        ingest={"rejections_per_topic_per_min": 0},
        zones=[{"id": "bulk-a", "setpoint_c": -25.0}, {"id": "dispatch", "setpoint_c": -25.0}],
        sources=[
            {"pattern": "kp/{zone}/{sensor}/air", "signal": "air_c", "value": "temp_c", "time": "ts"},
            {
                "pattern": "kp/{zone}/{sensor}/tagged",
                "signal": "air_c",
                "value": "v",
                "unit_field": "unit",
                "time": "ts",
            },
        ],
    )
    items = corpus(random.Random(3), 3000, NOW)
    extra = [
        ("kp/bulk\x07a/s1/air", b'{"temp_c": -25, "ts": 1}', "control character"),
        ("kp/+/s1/air", b"{}", "wildcard"),
    ]
    msgs = [Message(t, p, NOW, i, 1) for i, (t, p, _) in enumerate(items + extra)]
    for lo in range(0, len(msgs), 500):
        engine.process(msgs[lo : lo + 500], now=NOW)
    rows = store.conn.execute("SELECT topic, reason FROM rejections ORDER BY id").fetchall()
    held = store.conn.execute("SELECT topic, reason FROM held ORDER BY id").fetchall()
    bad = [(t, c) for t, _, c in items + extra if c not in ("good", *HELD)]
    late_or_early = [(t, c) for t, _, c in items if c in HELD]
    assert len(rows) == len(bad) and len(held) == len(late_or_early) > 0
    for (_, reason), (_, kind) in zip(rows + held, bad + late_or_early):
        words = REASONS.get(kind, "no source pattern matches")
        assert words in reason, (kind, reason)
    assert {c for _, c in bad + late_or_early} >= set(REASONS)  # every class was generated
    good = sum(1 for *_, c in items if c == "good")
    assert store.conn.execute("SELECT count(*) FROM readings").fetchone()[0] == good


def test_ten_thousand_generated_messages_through_a_real_broker(tmp_path):
    """10,000 generated messages, most of them bad, through a real broker: each recorded with its reason, nothing lost."""
    check_outcome(faults.bad_input(tmp_path, 10_000))


# --- faults against real processes ----------------------------------------------------------------


@pytest.mark.parametrize("crash", [False, True], ids=["raises", "crashes"])
def test_a_message_that_breaks_the_handler_is_set_aside(tmp_path, crash):
    """A message that makes the handler raise or the process crash is set aside; every good reading around it is stored."""
    check_outcome(faults.poison_message(tmp_path, crash))


def test_watcher_killed_at_random_moments(tmp_path):
    """Ten SIGKILLs at random moments of a stream: every reading stored once, state equal to a recomputation."""
    outcome = faults.kill_watcher(tmp_path, rounds=10)
    check_outcome(outcome)
    assert outcome.extra["killed_mid_batch"] >= 1  # a kill with a batch in hand, proven by the in-hand file


@pytest.mark.parametrize("hard", [False, True], ids=["sigterm", "sigkill"])
def test_broker_down_while_publishers_keep_publishing(tmp_path, hard):
    """The broker stopped or killed while a publisher keeps publishing: every reading arrives."""
    check_outcome(faults.broker_down(tmp_path, rounds=2, hard=hard))


@pytest.mark.parametrize("mode", ["drop", "stall", "slow"])
def test_network_between_watcher_and_broker(tmp_path, mode):
    """A dropped, stalled or slowed link: every reading arrives and a dead link is noticed within the keepalive."""
    outcome = faults.network(tmp_path, rounds=1, mode=mode)
    check_outcome(outcome)
    # keepalive 5 s: watcher pings after 2 s of silence and gives up 2 s later (+1 s for polling)
    assert all(d <= 5.0 + 1.0 for d in outcome.extra.get("detect_s", []))


@pytest.mark.skipif(faults.can_mount() is not None, reason=str(faults.can_mount()))
def test_disk_full_stops_acks_alerts_around_the_database_and_resumes(tmp_path):
    """A full disk stops acknowledgements, sends the storage alert around the database, and resumes once freed."""
    check_outcome(faults.disk_full(tmp_path))


def test_database_locked_by_another_process(tmp_path):
    """Held longer than the busy timeout (30 s), so a commit fails and is retried, a reload
    waits, and the stall shows in /healthz."""
    check_outcome(faults.database_locked(tmp_path, hold_s=36.0, stall_limit_s=10.0))


def test_a_hanging_receiver_never_blocks_ingestion(tmp_path):
    """A webhook that never answers does not hold up readings."""
    outcome = faults.hanging_receiver(tmp_path)
    check_outcome(outcome)
    assert outcome.recovery_s[0] < 30.0


def test_invalid_configuration_on_sighup(tmp_path):
    """SIGHUP with an invalid configuration keeps the running one and logs why."""
    check_outcome(faults.invalid_reload(tmp_path, rounds=3))


# --- clock trouble, through an injected clock ---------------------------------------------------------


def _air(k, ts, received, sensor="s1"):
    return Message(f"kp/bulk-a/{sensor}/air", json.dumps({"t": -25.0, "ts": ts}).encode(), received, k, 1)


def test_sensor_clock_ahead_or_behind(tmp_path):
    """A reading stamped up to the tolerance ahead of the service clock is taken; further ahead
    it is held with the reason (either clock may be wrong) and goes in once the clocks agree;
    one that never fits becomes a rejection after hold_days. One stamped behind (older than the
    reorder window) is taken as late and the zone recomputed, so its state equals a full
    recomputation."""
    cfg, store, engine = make(tmp_path)
    engine.process([_air(k, NOW - 3600 + 60 * k, NOW - 3600 + 60 * k) for k in range(60)], now=NOW)
    r = engine.process([_air(100, NOW + 240, NOW, "ahead-4min"), _air(101, NOW + 900, NOW, "ahead-15min")], now=NOW)
    assert (r.counts["accepted"], r.counts["held"], r.counts["rejected"]) == (1, 1, 0)
    reason = store.conn.execute("SELECT reason FROM held").fetchone()[0]
    assert "in the future" in reason and "tolerance 300 s" in reason
    assert readmit(engine, NOW + 300).counts["readmitted"] == 0  # still 300 s too early: kept
    assert readmit(engine, NOW + 650).counts["readmitted"] == 1  # within the tolerance now
    assert store.record.count("held") == 0 and engine.held_count == 0
    stored = store.conn.execute("SELECT count(*) FROM readings WHERE sensor = 'ahead-15min'").fetchone()[0]
    assert stored == 1
    engine.process([_air(103, NOW + 30 * 86400, NOW, "ahead-30d")], now=NOW)
    assert readmit(engine, NOW + 6 * 86400).counts["rejected"] == 0
    assert readmit(engine, NOW + 7 * 86400).counts["rejected"] == 1  # hold_days (7) without agreement
    reason = store.conn.execute("SELECT reason FROM rejections ORDER BY id DESC").fetchone()[0]
    assert "clocks never agreed" in reason and store.record.count("held") == 0
    engine.process([_air(102, NOW - 1800 + 30, NOW, "behind-30min")], now=NOW)  # late
    engine.checkpoint_all(NOW)
    fresh, saved = engine.recompute("bulk-a").state, store.zones.rows()["bulk-a"].state
    assert float(saved["time_ts"]) == fresh.time_ts and abs(saved["ub"] - fresh.ub).max() <= 1e-9 * abs(fresh.ub).max()


def test_service_clock_jumps(tmp_path):
    """The service clock jumps an hour ahead: the stale-sensor rule fires (a jump and a silent
    sensor look alike; documented) and clears with the next reading. It jumps back a day:
    nothing raises, nothing goes negative in the alert record."""
    cfg, store, engine = make(tmp_path, keep=("sensor-stale",))
    engine.process([_air(k, NOW - 600 + 60 * k, NOW - 600 + 60 * k) for k in range(10)], now=NOW)
    with store.atomic():
        engine.monitor.tick(NOW, True, True)
    assert store.alerts.list(open_only=True) == []
    jumped = NOW + 3600
    with store.atomic():
        engine.monitor.tick(jumped, True, True)
    opened = store.alerts.list(open_only=True)
    assert [a["rule"] for a in opened] == ["sensor-stale"]
    engine.process([_air(50, jumped - 10, jumped)], now=jumped)
    with store.atomic():
        engine.monitor.tick(jumped + 1, True, True)
    assert store.alerts.list(open_only=True) == []
    back = NOW - 86400
    with store.atomic():
        engine.monitor.tick(back, True, True)
    engine.process([_air(51, back - 5, back)], now=back)
    with store.atomic():
        engine.monitor.tick(back + 1, True, True)
    assert store.alerts.list(open_only=True) == []
    values = [r[0] for r in store.conn.execute("SELECT value FROM alert_log WHERE value IS NOT NULL")]
    assert all(v >= 0 for v in values)


# --- security ---------------------------------------------------------------------------------------


@pytest.mark.parametrize("case", ["wrong CA", "wrong host name", "plain-text listener"])
def test_tls_fails_clearly_and_never_falls_back(tmp_path, broker, case):
    """With [broker.tls] set, a wrong CA, a host name the certificate does not name, or a
    listener that speaks plain MQTT: no connection, a clear error in /readyz and the log, and
    no CONNECT (so no password) ever reaches the broker."""
    config = write_config(tmp_path, broker, tls=True, reorder_s=0.0)
    text = config.read_text()
    if case == "wrong CA":
        (tmp_path / "other-ca").mkdir()
        other = make_ca(tmp_path / "other-ca")
        text = text.replace(str(broker.tls["ca"]), str(other["ca"]))
    elif case == "wrong host name":
        text = text.replace('host = "localhost"', 'host = "127.1"')  # reaches 127.0.0.1; the certificate names neither
    else:
        text = text.replace(f"port = {broker.tls_port}", f"port = {broker.port}")
    config.write_text(text)
    w = WatcherProcess(config)
    wait_for(lambda: (json.loads(w.get("/readyz")[1] or b"{}").get("broker_error") or "") != "", timeout=30)
    detail = json.loads(w.get("/readyz")[1])
    assert detail["broker"] is False
    expected = {
        "wrong CA": "certificate signature failure",  # OpenSSL's words: the CA is not the signer
        "wrong host name": "Hostname mismatch, certificate is not valid for '127.1'",
        "plain-text listener": "the broker closed the connection (is this port a plain-text listener?)",
    }
    assert detail["broker_error"].startswith("TLS handshake with ") and expected[case] in detail["broker_error"], detail
    assert detail["broker_error"] in w.log.read_text()
    assert w.stop() == 0
    assert "watcher-test" not in broker.log()  # the broker never saw our client id: no CONNECT in clear


def test_secrets_never_appear_in_logs_status_alerts_or_reports(tmp_path, broker):
    """The broker password, and a webhook password, a token in the webhook's path and a bearer
    header in a notification URL: grep the log, status (text and JSON), alerts, test-notify,
    the HTTP endpoints, the outbox and a weekly summary for them."""
    hook = Receiver()
    hook_secret = "Hook-Pa55-do-not-print"
    path_token = "T0ken-in-the-path-7d2f9c"
    bearer = "Bearer-value-k3y-a81e"
    try:
        url = hook.url(f"/{path_token}?+Authorization=Bearer%20{bearer}").replace(
            "json://", f"json://qa:{hook_secret}@"
        )
        extra = AIR_ALERT_AT_ONCE_TOML + channel_toml(tmp_path, "qa-hook", url)
        config = write_config(tmp_path, broker, reorder_s=0.0, extra=extra)
        w = WatcherProcess(config)
        w.wait_ready()
        pub = Publisher(broker)
        pub.send(messages(faults.ZONES, 0, 30))
        wait_for(lambda: readings_count(tmp_path / "watcher.db") == 60, timeout=30)
        wait_for(lambda: len(hook.bodies) >= 1, timeout=30, what="an alert through the webhook")
        outputs = [w.get(p)[1].decode() for p in ("/healthz", "/readyz", "/metrics")]
        assert w.stop() == 0
        pub.close()

        def cli(*args):
            cmd = [sys.executable, "-m", "watcher", *args, "--config", str(config)]
            out = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
            return out.stdout + out.stderr

        outputs += [cli("status"), cli("status", "--json"), cli("alerts", "--json")]
        checked = subprocess.run(
            [sys.executable, "-m", "watcher", "check-config", str(config)], capture_output=True, text=True
        )
        assert checked.returncode == 0, checked.stderr
        outputs.append(checked.stdout + checked.stderr)
        outputs.append(cli("test-notify"))
        outputs.append(cli("report", "--week", "2026-W47", "--out", str(tmp_path / "rep")))
        outputs += [p.read_text(errors="replace") for p in (tmp_path / "rep").rglob("*") if p.is_file()]
        outputs.append(w.log.read_text())
        with contextlib.closing(sqlite3.connect(tmp_path / "watcher.db")) as con:
            outputs += [str(r) for r in con.execute("SELECT * FROM outbox")]
    finally:
        hook.close()
    everything = "\n".join(outputs)
    assert len(everything) > 10_000 and "qa-hook" in everything  # plenty to look through, the channel named
    assert "json://****@127.0.0.1" in everything  # the channel is shown, masked
    for secret in (broker.PASSWORD, hook_secret, path_token, bearer):
        assert secret not in everything, secret


def test_acknowledgements_come_only_from_the_command_topic(tmp_path):
    """An ack-shaped message on a sensor topic is a bad reading, not an acknowledgement."""
    cfg, store, engine = make(tmp_path, rules=[{"id": "air-benchmark", "above": -30.0, "for_min": 0}])
    engine.process([_air(k, NOW - 600 + 60 * k, NOW) for k in range(5)], now=NOW)
    (alert,) = store.alerts.list(open_only=True)
    forged = json.dumps({"alert": alert["id"], "by": "intruder"}).encode()
    engine.process([Message("kp/bulk-a/s1/air", forged, NOW, 99, 1)], now=NOW)
    engine.monitor.apply_commands(NOW + 1)
    assert store.alerts.get(alert["id"])["status"] == "open"
    reason = store.conn.execute("SELECT reason FROM rejections ORDER BY id DESC").fetchone()[0]
    assert "missing field" in reason


def test_http_endpoint_binds_to_loopback_by_default(tmp_path, broker):
    """The health endpoint listens on loopback only unless configured otherwise."""
    config = write_config(tmp_path, broker)
    assert "host =" not in config.read_text().split("[health]")[1].split("[")[0]  # the default is used
    w = WatcherProcess(config)
    w.wait_ready()
    port_hex = f"{w.health_port:04X}"
    listening = [
        line.split()[1]
        for line in Path("/proc/net/tcp").read_text().splitlines()[1:]
        if line.split()[1].endswith(":" + port_hex) and line.split()[3] == "0A"
    ]
    assert listening == ["0100007F:" + port_hex]  # 127.0.0.1 only
    status, body = w.get("/readyz")
    assert broker.PASSWORD not in body.decode()
    assert w.stop() == 0


@pytest.mark.skipif(faults.FAKETIME_LIB is None, reason="libfaketime is not installed (apt-get install faketime)")
def test_a_wrong_service_clock_loses_and_deletes_nothing(tmp_path):
    """A service clock 401 days ahead, then an hour slow: retention deletes nothing and every reading is held, then stored."""
    check_outcome(faults.service_clock_wrong(tmp_path))


def test_retained_readings_of_receive_time_sources_are_refused_at_reconnect(tmp_path, broker):
    """A gateway publishes a door state with retain: the live message is a reading, but the
    broker replays it at every reconnect; stamped with the receive time, each replay would be a
    fresh reading and hide a dead sensor. The replays are refused with the reason and counted;
    a retained reading that carries its own time is only a duplicate."""
    config = write_config(tmp_path, broker, reorder_s=0.0)
    db = tmp_path / "watcher.db"
    w = WatcherProcess(config)
    w.wait_ready()
    pub = Publisher(broker)
    pub.send([("kp/bulk-a/door", b"1")], retain=True)
    pub.send(messages(faults.ZONES, 0, 1), retain=True)
    wait_for(lambda: readings_count(db) == 3, 30, "the live door and air readings")
    refused = "SELECT count(*) FROM rejections WHERE reason LIKE 'retained%'"
    for k in (1, 2):  # each restart: the broker replays the retained door state, refused once
        assert w.stop() == 0
        w = WatcherProcess(config)
        w.wait_ready()
        wait_for(lambda k=k: faults._count(db, refused) == k, 30, f"{k} refused")
    doors = faults._count(db, "SELECT count(*) FROM readings WHERE signal = 'door'")
    status = w.get("/metrics")[1].decode()
    assert w.stop() == 0
    pub.send([("kp/bulk-a/door", b""), ("kp/bulk-a/s1/air", b"")], retain=True)  # clear the broker's copies
    pub.close()
    assert doors == 1 and readings_count(db) == 3
    assert 'watcher_rejections_total{reason="retained"} 1.0' in status
    out = subprocess.run([sys.executable, "-m", "watcher", "check-config", str(config)], capture_output=True, text=True)
    assert "receive time (retained messages refused)" in out.stdout, out.stdout + out.stderr


def test_idle_http_connections_are_bounded_and_dropped(tmp_path, broker):
    """300 connections to the health port that never send a request: watcher holds at most a
    handful of descriptors for them, drops them after the request timeout, and answers again."""
    import socket

    from watcher.health import MAX_CONNECTIONS, REQUEST_TIMEOUT_S

    config = write_config(tmp_path, broker, reorder_s=0.0)
    w = WatcherProcess(config)
    w.wait_ready()
    fds_before = len(list(Path(f"/proc/{w.proc.pid}/fd").iterdir()))
    idle = []
    for _ in range(300):
        s = socket.create_connection(("127.0.0.1", w.health_port))
        idle.append(s)
    time.sleep(1.0)
    fds_during = len(list(Path(f"/proc/{w.proc.pid}/fd").iterdir()))
    t0 = time.monotonic()
    wait_for(lambda: w.get("/healthz")[0] == 200, REQUEST_TIMEOUT_S + 10, "an answer again")
    waited = time.monotonic() - t0
    for s in idle:
        s.close()
    assert w.stop() == 0
    assert fds_during - fds_before <= MAX_CONNECTIONS + 4, (fds_before, fds_during)
    assert waited <= REQUEST_TIMEOUT_S + 5


def test_rejections_past_a_topics_rate_are_counted_not_stored_one_by_one(tmp_path):
    """A gateway floods one topic with 5,000 bad messages: 60 a minute are stored in full, the
    rest become rows that say how many they stand for; every message is accounted for, and
    another topic's rejections are stored in full beside them."""
    cfg, store, engine = make(tmp_path)
    flood = [Message("kp/bulk-a/s1/air", b"garbage", NOW + i * 0.001, i, 1) for i in range(5000)]
    other = [Message("kp/bulk-a/s2/air", b"{}", NOW, 9000 + i, 1) for i in range(10)]
    for lo in range(0, 5000, 500):
        engine.process(flood[lo : lo + 500] + (other if lo == 0 else []), now=NOW)
    rows = store.conn.execute("SELECT topic, n, reason FROM rejections ORDER BY id").fetchall()
    per_topic = {t: sum(n for tt, n, _ in rows if tt == t) for t in {r[0] for r in rows}}
    assert per_topic == {"kp/bulk-a/s1/air": 5000, "kp/bulk-a/s2/air": 10}
    flood_rows = [r for r in rows if r[0] == "kp/bulk-a/s1/air"]
    assert len(flood_rows) == 60 + 10  # 60 in full, then one counting row per batch
    assert "within the minute" in flood_rows[-1][2] and "invalid JSON" in flood_rows[-1][2]
    findings, _ = chain.verify(store.conn)
    assert findings == []
    # Every place that counts rejections counts messages, not rows: the service-wide rule's
    # figure, `watcher status`, and the weekly summary's table.
    import pandas as pd

    from watcher.report.figures import rejection_table

    assert store.rejections.since(NOW - 3600) == 5010
    table = rejection_table(pd.DataFrame(rows, columns=["topic", "n", "reason"]))
    assert table["messages"].sum() == 5010 and table.iloc[0]["messages"] == 5000


def test_a_zone_takes_at_most_its_cap_of_sensor_names(tmp_path):
    """A runaway gateway inventing sensor names: past ingest.max_sensors_per_zone new names are
    rejected with the reason; known sensors still go in, and the cap survives a restart."""
    cfg, store, engine = make(tmp_path, ingest={"max_sensors_per_zone": 5})
    msgs = [_air(k, NOW - 600 + k, NOW, f"s{k}") for k in range(8)] + [_air(20, NOW - 500, NOW, "s1")]
    r = engine.process(msgs, now=NOW)
    assert (r.counts["accepted"], r.counts["rejected"]) == (6, 3)
    reasons = [x[0] for x in store.conn.execute("SELECT reason FROM rejections")]
    assert all("already has 5 sensors" in x and "max_sensors_per_zone" in x for x in reasons)
    again = Engine(cfg, store, checkpoint_s=0.0)
    assert again.process([_air(30, NOW - 400, NOW, "s9")], now=NOW).counts["rejected"] == 1
    assert again.process([_air(31, NOW - 300, NOW, "s2")], now=NOW).counts["accepted"] == 1


def test_broker_killed_mid_stream_loses_only_its_unsaved_window(tmp_path):
    """The broker killed mid-stream: every message it delivered to watcher is stored; its own losses are counted apart."""
    outcome = faults.broker_killed_mid_stream(tmp_path, rounds=2)
    check_outcome(outcome)
