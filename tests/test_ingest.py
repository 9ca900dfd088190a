"""Topic patterns and payload parsing: every refusal carries a reason."""

import json

import pytest

from watcher.ingest.payload import Limits, Rejected, Source, parse_message
from watcher.ingest.topics import parse_pattern, topic_is_clean

NOW = 1_795_000_000.0


def src(**kw):
    base = dict(
        pattern=parse_pattern("kp/{zone}/{sensor}/air"),
        signal="air_c",
        value_path=("t",),
        time_path=("ts",),
        time_format="iso",
    )
    base.update(kw)
    return Source(**base)


DEFAULT_LIMITS = Limits()


def parse(source, payload, names=None, limits=DEFAULT_LIMITS):
    return parse_message(source, names or {"zone": "bulk-a", "sensor": "s1"}, payload, NOW, limits)


def test_pattern_filter_and_match():
    """A pattern subscribes with + per placeholder and yields the placeholder values."""
    p = parse_pattern("kp/{zone}/{sensor}/air")
    assert p.filter == "kp/+/+/air"
    assert p.match("kp/bulk-a/s1/air") == {"zone": "bulk-a", "sensor": "s1"}
    assert p.match("kp/bulk-a/s1/door") is None
    assert p.match("kp/bulk-a/air") is None
    assert p.match("kp/+/s1/air") is None and p.match("kp/a\x01b/s1/air") is None


@pytest.mark.parametrize("bad", ["kp/#", "kp/+/air", "kp/{zone}x/air", "/kp/{zone}", "kp/{zone}/{zone}", "kp//x"])
def test_unusable_patterns_are_refused(bad):
    """Wildcards, partial placeholders, empty levels and repeated names are refused."""
    with pytest.raises(ValueError):
        parse_pattern(bad)


def test_clean_topics():
    """Configured topics may not hold wildcards, empty levels or control characters."""
    assert topic_is_clean("watcher/status")
    assert not topic_is_clean("watcher/+") and not topic_is_clean("a//b") and not topic_is_clean("a/\x00")


@pytest.mark.parametrize(("unit", "raw", "expected"), [("C", -18.0, -18.0), ("F", -0.4, -18.0), ("K", 255.15, -18.0)])
def test_units_are_normalised_to_celsius(unit, raw, expected):
    """°F and K become °C."""
    r = parse(src(unit=unit), json.dumps({"t": raw, "ts": "2026-11-18T10:00:00Z"}).encode())
    assert r.value == pytest.approx(expected)
    assert r.zone == "bulk-a" and r.sensor == "s1" and r.signal == "air_c"


def test_timestamp_formats():
    """ISO 8601 (Z, offsets, naive = UTC), epoch seconds and milliseconds; receive time when none."""
    iso = parse(src(), b'{"t": -20, "ts": "2026-11-18T09:20:00+01:00"}')
    naive = parse(src(), b'{"t": -20, "ts": "2026-11-18T08:20:00"}')
    assert iso.ts == naive.ts
    ms = parse(src(time_format="epoch_ms"), json.dumps({"t": -20, "ts": (NOW - 10) * 1000}).encode())
    assert ms.ts == NOW - 10
    plain = parse(src(fmt="number", time_path=None), b" -21.5 ")
    assert plain.ts == NOW and plain.value == -21.5


@pytest.mark.parametrize(
    ("payload", "reason"),
    [
        (b"{not json", "invalid JSON"),
        (b'{"t": NaN, "ts": "2026-11-18T10:00:00Z"}', "invalid JSON"),
        (b'{"t": "cold", "ts": "2026-11-18T10:00:00Z"}', "expected a number"),
        (b'{"ts": "2026-11-18T10:00:00Z"}', "missing field t"),
        (b'{"t": -20}', "missing field ts"),
        (b'{"t": -20, "ts": "yesterday"}', "not ISO 8601"),
        (b'{"t": 95, "ts": "2026-11-18T10:00:00Z"}', "outside the plausible range"),
        (b'{"t": -20, "ts": "2030-01-01T00:00:00Z"}', "in the future"),
        (b'{"t": -20, "ts": "2020-01-01T00:00:00Z"}', "in the past"),
        (b"\xff\xfe", "not UTF-8"),
        (b"[" * 100_000, "nested too deeply"),
    ],
)
def test_bad_payloads_are_rejected_with_a_reason(payload, reason):
    """Each bad payload raises Rejected naming what was wrong."""
    with pytest.raises(Rejected, match=reason):
        parse(src(), payload, limits=Limits(max_payload_bytes=1_000_000))


def test_oversized_payload_is_rejected():
    """A payload over max_payload_bytes is rejected with the sizes named."""
    with pytest.raises(Rejected, match="exceeds 64"):
        parse(src(), b'{"t": -20}' + b" " * 100, limits=Limits(max_payload_bytes=64))


@pytest.mark.parametrize(("raw", "value"), [("open", 1.0), ("CLOSED", 0.0), (True, 1.0), (0, 0.0), ("on", 1.0)])
def test_door_states(raw, value):
    """Door and defrost states read open/closed, on/off, true/false, 1/0."""
    s = src(signal="door", value_path=("state",), time_path=None)
    assert parse(s, json.dumps({"state": raw}).encode()).value == value
    with pytest.raises(Rejected, match="state"):
        parse(s, b'{"state": "ajar"}')


def test_the_mqtt_process_stays_light():
    """The network process imports paho and ingest's own small modules only: not the
    configuration reader, the model or numpy (bench/mqtt_child.py measures its start)."""
    import subprocess
    import sys

    code = (
        "import sys, watcher.ingest.mqtt_process, watcher.ingest.mqtt\n"
        "heavy = [m for m in ('numpy', 'watcher.config', 'watcher.model', 'watcher.engine', 'watcher.store') "
        "if m in sys.modules]\n"
        "print(','.join(heavy))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""


@pytest.mark.parametrize(
    ("payload", "value"), [(b"open", 1.0), (b"CLOSED\n", 0.0), (b" On ", 1.0), (b"false", 0.0), (b"1", 1.0), (b"0", 0.0)]
)
def test_a_bare_state_word_is_a_door_reading(payload, value):
    """format = "text": a hard-wired contact's bare payload, any case, spaces ignored; the
    receive time stamps it."""
    s = src(signal="door", fmt="text", time_path=None)
    reading = parse(s, payload)
    assert (reading.value, reading.ts) == (value, NOW)


@pytest.mark.parametrize(
    ("signal", "payload", "reason"),
    [
        ("door", b"ajar", "state 'ajar' is not open/closed"),
        ("door", b"", "state '' is not open/closed"),
        ("door", b"2", "state 2.0 is not open/closed"),
        ("air_c", b"open", "payload 'open' is not a number"),
        ("air_c", b"nan", "not finite"),
    ],
)
def test_a_bare_payload_that_is_not_its_signal_is_refused_with_the_reason(signal, payload, reason):
    with pytest.raises(Rejected, match=reason):
        parse(src(signal=signal, fmt="text", time_path=None), payload)


def test_a_bare_temperature_takes_the_source_unit():
    assert parse(src(fmt="text", time_path=None, unit="F"), b"-4").value == pytest.approx(-20.0)
