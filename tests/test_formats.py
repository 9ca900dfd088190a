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
                ("kp/bulk-a/d1/contact", b"closed\n"),
                # bad variants
                ("kp/bulk-a/d1/contact", b"ajar"),
                ("kp/bulk-a/gw/senml", pack(now + 120, unit="%RH")),
                ("kp/bulk-a/gw/senml", json.dumps([{"n": "other", "v": 1}]).encode()),
                ("kp/bulk-a/gw/senml", b'{"n": "air", "v": -20}'),
                ("kp/bulk-a/gw/senml", b"[{oops"),
            ]
        )
        db = tmp_path / "watcher.db"

        def stored():
            with sqlite3.connect(db) as c:
                readings = c.execute("SELECT sensor, signal, ts, value FROM readings ORDER BY signal, ts").fetchall()
                reasons = [r[0] for r in c.execute("SELECT reason FROM rejections ORDER BY id")]
            return readings, reasons

        wait_for(lambda: len(stored()[0]) == 4 and len(stored()[1]) == 5, timeout=30, what="readings and rejections")
        readings, reasons = stored()
        air = [r for r in readings if r[1] == "air_c"]
        assert [(r[0], r[2]) for r in air] == [("gw-air", now), ("gw-air", now + 60)]
        assert air[0][3] == -24.5 and abs(air[1][3] - (-24.0)) < 1e-9  # 249.15 K
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
        assert 'watcher_readings_total{result="records_ignored"} 4.0' in metrics  # coil and fan, twice
        assert w.proc.poll() is None
        assert w.stop() == 0
    finally:
        pub.close()
        if w.proc.poll() is None:
            w.kill()
