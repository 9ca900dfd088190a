"""Generated sensor messages, most of them bad, for the abuse tests. Each carries its class and
the words its rejection reason must contain. Topics follow tests/service_harness.py's sources:
kp/{zone}/{sensor}/air (JSON temp_c + ts in epoch seconds) and kp/{zone}/{sensor}/tagged
(JSON v + unit + ts, where the payload names its unit)."""

from __future__ import annotations

import json
import random

ZONES = ("bulk-a", "dispatch")

# class -> words in the stored reason (checked by the in-process test)
# Classes whose time disagrees with the service clock: held (engine/held.py), not rejected.
HELD = ("timestamp far in the past", "timestamp in the future")
REASONS = {
    "invalid JSON": "invalid JSON",
    "truncated JSON": "invalid JSON",
    "not UTF-8": "not UTF-8",
    "deep nesting": "nested too deeply",
    "over the size limit": "exceeds",
    "NaN or Infinity": "not valid JSON",
    "number too large": "not finite",
    "number as a string": "expected a number",
    "wrong type": "expected a number",
    "missing value": "missing field",
    "missing timestamp": "missing field",
    "timestamp far in the past": "days in the past",
    "timestamp in the future": "in the future",
    "unknown unit": "is not one of C, F, K",
    "implausible temperature": "plausible range",
    "unknown zone": "unknown zone",
    "empty payload": "invalid JSON",
    "not an object": "missing field",
    "integer of hundreds of digits": "digits",
    "lone UTF-16 surrogate": "surrogate",
    "ack with an impossible alert id": "ack command",
    "lot event at an impossible time": "time: got",
}


def corpus(rng: random.Random, count: int, now_ts: float) -> list[tuple[str, bytes, str]]:
    """`count` messages: about one in six good, the rest spread over the bad classes."""
    out = []
    classes = list(REASONS)
    for i in range(count):
        zone = rng.choice(ZONES)
        ts = now_ts - 2 * 86400 + i  # unique per message: good ones never collide as duplicates
        if rng.random() < 1 / 6:
            out.append(_good(rng, zone, i, ts))
            continue
        kind = rng.choice(classes)
        out.append((*_bad(rng, kind, zone, i, ts, now_ts), kind))
    return out


def _good(rng, zone, i, ts):
    if rng.random() < 0.5:
        return (
            f"kp/{zone}/fz{i % 5}/air",
            json.dumps({"temp_c": round(rng.uniform(-27, -22), 2), "ts": ts}).encode(),
            "good",
        )
    unit, v = rng.choice([("C", -25.0), ("F", -13.0), ("K", 248.15), ("degC", -24.0), ("celsius", -26.0)])
    return f"kp/{zone}/fz{i % 5}/tagged", json.dumps({"v": v, "unit": unit, "ts": ts}).encode(), "good"


def _bad(rng, kind, zone, i, ts, now_ts) -> tuple[str, bytes]:
    air = f"kp/{zone}/fz{i % 5}/air"
    doc = {"temp_c": -25.0, "ts": ts}
    text = json.dumps(doc)
    if kind == "invalid JSON":
        return air, rng.choice([b"{temp_c: -25}", b"{'temp_c': -25}", b"temp=-25", b"{,}", b"-25 C"])
    if kind == "truncated JSON":
        return air, text[: rng.randrange(1, len(text) - 1)].encode()
    if kind == "not UTF-8":
        return air, b'{"temp_c": -25, "x": "\xff\xfe' + bytes(rng.randrange(128, 256) for _ in range(4)) + b'"}'
    if kind == "deep nesting":
        depth = rng.randrange(2000, 6000)
        return air, ("[" * depth + "]" * depth).encode()
    if kind == "over the size limit":
        return air, json.dumps({**doc, "pad": "x" * rng.randrange(66_000, 90_000)}).encode()
    if kind == "NaN or Infinity":
        return air, f'{{"temp_c": {rng.choice(["NaN", "Infinity", "-Infinity"])}, "ts": {ts}}}'.encode()
    if kind == "number too large":
        return air, f'{{"temp_c": 1e{rng.randrange(309, 999)}, "ts": {ts}}}'.encode()
    if kind == "number as a string":
        return air, json.dumps({"temp_c": "-25.0", "ts": ts}).encode()
    if kind == "wrong type":
        return air, json.dumps({"temp_c": rng.choice([[1, 2], True, None, {"c": -25}]), "ts": ts}).encode()
    if kind == "missing value":
        return air, json.dumps({"temperature": -25.0, "ts": ts}).encode()
    if kind == "missing timestamp":
        return air, json.dumps({"temp_c": -25.0}).encode()
    if kind == "timestamp far in the past":
        return air, json.dumps({"temp_c": -25.0, "ts": now_ts - rng.randrange(401, 5000) * 86400}).encode()
    if kind == "timestamp in the future":
        return air, json.dumps({"temp_c": -25.0, "ts": now_ts + rng.randrange(3600, 30 * 86400)}).encode()
    if kind == "unknown unit":
        unit = rng.choice(["R", "degX", "kelvins?", 123, None, ""])
        return f"kp/{zone}/fz{i % 5}/tagged", json.dumps({"v": -25.0, "unit": unit, "ts": ts}).encode()
    if kind == "implausible temperature":
        return air, json.dumps({"temp_c": rng.choice([500.0, -273.0, 85.0, -90.0]), "ts": ts}).encode()
    if kind == "unknown zone":
        return f"kp/zone-{rng.randrange(99)}/s1/air", text.encode()
    if kind == "empty payload":
        return air, b""
    if kind == "not an object":
        return air, rng.choice([b"[-25, 1]", b"-25", b'"-25"', b"null"])
    if kind == "integer of hundreds of digits":
        digits = "9" * rng.randrange(25, 400)
        return air, rng.choice([f'{{"temp_c": {digits}, "ts": {ts}}}', f'{{"temp_c": -25, "ts": {digits}}}']).encode()
    if kind == "lone UTF-16 surrogate":
        return rng.choice(
            [
                (air, f'{{"temp_c": -25, "ts": {ts}, "note": "\\ud800"}}'.encode()),
                ("watcher/ack", b'{"alert": 1, "by": "\\udc00"}'),
                ("watcher/lots", b'{"event": "arrive", "lot": "L-1", "zone": "bulk-a", "note": "\\ud83d"}'),
            ]
        )
    if kind == "ack with an impossible alert id":
        return "watcher/ack", json.dumps({"alert": rng.choice([2**63, 10**19 + 7, 0, -3]), "by": "ops"}).encode()
    if kind == "lot event at an impossible time":
        doc = {"event": "arrive", "lot": f"L-{i}", "zone": zone, "time": rng.choice([1e300, -1e300, -5.0, 1e12])}
        return "watcher/lots", json.dumps(doc).encode()
    raise ValueError(kind)
