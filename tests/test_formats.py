"""Payload formats through the real service: mosquitto + `watcher run` + a real SQLite file.

A hard-wired door contact publishing bare words (format = "text") and a gateway publishing
SenML packs with mixed records (format = "senml"): the readings they carry are stored, the
other SenML records are counted, and every bad variant becomes a stored rejection with its
reason (none of them stops the service)."""

import json
import sqlite3
import time

from tests.service_harness import Publisher, WatcherProcess, wait_for, write_config

SOURCES = """
[[sources]]
pattern = "kp/{zone}/{sensor}/contact"
signal = "door"
format = "text"

[[sources]]
pattern = "kp/{zone}/gw/senml"
signal = "air_c"
format = "senml"
value = "urn:dev:mac:0024befffe804ff1:air"
sensor = "gw-air"
"""


def stored(db, n_readings: int, n_rejections: int) -> tuple[list, list]:
    """Once the service has stored that many readings and rejections: (sensor, signal, ts,
    value) in time order, and the rejection reasons in arrival order."""

    def read():
        with sqlite3.connect(db) as c:
            readings = c.execute("SELECT sensor, signal, ts, value FROM readings ORDER BY ts").fetchall()
            reasons = [r[0] for r in c.execute("SELECT reason FROM rejections ORDER BY id")]
        return readings, reasons

    wait_for(lambda: [len(x) for x in read()] == [n_readings, n_rejections], timeout=30, what="readings and rejections")
    return read()


def series(end_ts: float) -> bytes:
    """A gateway's buffered series: three air records a minute apart, relative to bt, and one other."""
    records = [{"bn": "urn:dev:mac:0024befffe804ff1:", "bt": end_ts, "bu": "Cel", "n": "air", "v": -24.1, "t": -120}]
    records += [{"n": "air", "v": -24.2, "t": -60}, {"n": "air", "v": -24.3}, {"n": "rh", "u": "%RH", "v": 80}]
    return json.dumps(records).encode()


def pack(ts: float, air=-24.5, unit="Cel") -> bytes:
    return json.dumps(
        [
            {"bn": "urn:dev:mac:0024befffe804ff1:", "bt": ts, "bu": unit, "n": "air", "v": air},
            {"n": "coil", "v": -31.0},
            {"n": "fan", "vb": True},
        ]
    ).encode()


def test_text_doors_and_senml_packs_are_stored_and_bad_variants_rejected_with_reasons(tmp_path, broker):
    """Four good messages become four readings (a K pack converted to C); five bad ones become
    five rejections, each with its reason, in order; the service keeps running."""
    config = write_config(tmp_path, broker, zones=("bulk-a",), extra=SOURCES, reorder_s=0.0)
    w = WatcherProcess(config)
    pub = Publisher(broker)
    now = round(time.time()) - 120
    try:
        w.wait_ready()
        pub.send(
            [
                ("kp/bulk-a/d1/contact", b"OPEN"),
                ("kp/bulk-a/gw/senml", pack(now)),
                ("kp/bulk-a/gw/senml", pack(now + 60, air=249.15, unit="K")),
                ("kp/bulk-a/gw/senml", series(now + 110)),
                ("kp/bulk-a/d1/contact", b"closed\n"),
                # bad variants
                ("kp/bulk-a/d1/contact", b"ajar"),
                ("kp/bulk-a/gw/senml", pack(now + 120, unit="%RH")),
                ("kp/bulk-a/gw/senml", json.dumps([{"n": "other", "v": 1}]).encode()),
                ("kp/bulk-a/gw/senml", b'{"n": "air", "v": -20}'),
                ("kp/bulk-a/gw/senml", b"[{oops"),
            ]
        )
        readings, reasons = stored(tmp_path / "watcher.db", 7, 5)
        readings = sorted(readings, key=lambda r: (r[1], r[2]))
        air = [r for r in readings if r[1] == "air_c"]
        by_time = {round(r[2] - now): r[3] for r in air}
        assert {r[0] for r in air} == {"gw-air"} and set(by_time) == {-10, 0, 50, 60, 110}
        assert by_time[0] == -24.5 and abs(by_time[60] - (-24.0)) < 1e-9  # 249.15 K
        assert [by_time[t] for t in (-10, 50, 110)] == [-24.1, -24.2, -24.3]  # a series pack: a reading per record
        assert [r[3] for r in readings if r[1] == "door"] == [1.0, 0.0]
        expected = [
            "state 'ajar' is not open/closed",
            "unit '%RH' is not a temperature unit",
            "no SenML record named 'urn:dev:mac:0024befffe804ff1:air'",
            "SenML pack is not a non-empty JSON array",
            "invalid JSON",
        ]
        for want, got in zip(expected, reasons):
            assert want in got, (want, got)
        metrics = w.get("/metrics")[1].decode()
        assert 'watcher_readings_total{result="records_ignored"} 5.0' in metrics  # coil and fan twice, rh once
        assert w.proc.poll() is None
        assert w.stop() == 0
    finally:
        pub.close()
        if w.proc.poll() is None:
            w.kill()


SPARKPLUG = """
[[sources]]
pattern = "spBv1.0/kestrel/DDATA/{zone}/{sensor}"
signal = "air_c"
format = "sparkplug"
value = "Air"
"""


def test_sparkplug_birth_then_data_by_alias_and_bad_payloads_rejected(tmp_path, broker):
    """Data naming the metric only by alias before any birth is refused saying so; then a
    DBIRTH names the aliases and the next DDATA by alias is stored with its own timestamp; a
    truncated payload and a data message without the metric become rejections with reasons.
    The service subscribes to the births itself (from the source's data topic), and keeps
    what they said across a restart."""
    from tests import sparkplug_encode as enc

    config = write_config(tmp_path, broker, zones=("bulk-a",), extra=SPARKPLUG, reorder_s=0.0)
    w = WatcherProcess(config)
    pub = Publisher(broker)
    now_ms = (round(time.time()) - 120) * 1000
    data_topic, birth_topic = "spBv1.0/kestrel/DDATA/bulk-a/edge1", "spBv1.0/kestrel/DBIRTH/bulk-a/edge1"
    try:
        w.wait_ready()
        pub.send([(data_topic, enc.payload([enc.metric(alias=7, value=-24.0)], timestamp_ms=now_ms))])
        pub.send(
            [
                (
                    birth_topic,
                    enc.payload([enc.metric("Air", alias=7, value=-24.2), enc.metric("RH", alias=8, value=80.0)]),
                )
            ]
        )
        pub.send(
            [
                (
                    data_topic,
                    enc.payload(
                        [enc.metric(alias=7, value=-23.5), enc.metric(alias=8, value=79.0)],
                        timestamp_ms=now_ms + 60_000,
                    ),
                ),
                (
                    data_topic,
                    enc.payload([enc.metric("Air", value=-23.9, kind="float")], timestamp_ms=now_ms + 120_000),
                ),
                (data_topic, b"\x12\x09\x0a\x03Ai"),
                (data_topic, enc.payload([enc.metric("RH", value=78.0)], timestamp_ms=now_ms + 180_000)),
            ]
        )
        readings, reasons = stored(tmp_path / "watcher.db", 2, 3)
        assert [(s, t) for s, _, t, _ in readings] == [("edge1", now_ms / 1000 + 60), ("edge1", now_ms / 1000 + 120)]
        assert readings[0][3] == -23.5 and abs(readings[1][3] - (-23.9)) < 1e-5  # a float32 value
        assert "carry only an alias no birth certificate has named yet" in reasons[0]
        assert "ends inside a field" in reasons[1] and "no Sparkplug metric named 'Air'" in reasons[2]
        metrics = w.get("/metrics")[1].decode()
        assert 'watcher_readings_total{result="sparkplug_birth"} 1.0' in metrics
        assert w.stop() == 0
        # After a restart, with no new birth, alias-only data are still read (the aliases were kept).
        w = WatcherProcess(config)
        w.wait_ready()
        pub.send([(data_topic, enc.payload([enc.metric(alias=7, value=-23.0)], timestamp_ms=now_ms + 240_000))])
        readings, _ = stored(tmp_path / "watcher.db", 3, 3)
        assert readings[-1][2:] == (now_ms / 1000 + 240, -23.0)
        assert w.stop() == 0
    finally:
        pub.close()
        if w.proc.poll() is None:
            w.kill()
