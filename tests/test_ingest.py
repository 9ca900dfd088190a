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
    ("payload", "value"),
    [(b"open", 1.0), (b"CLOSED\n", 0.0), (b" On ", 1.0), (b"false", 0.0), (b"1", 1.0), (b"0", 0.0)],
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
    """A word that is no state, a number that is no state, a word for a temperature: refused, saying why."""
    with pytest.raises(Rejected, match=reason):
        parse(src(signal=signal, fmt="text", time_path=None), payload)


def test_a_bare_temperature_takes_the_source_unit():
    """A bare -4 on a source in F is -20 C."""
    assert parse(src(fmt="text", time_path=None, unit="F"), b"-4").value == pytest.approx(-20.0)


def senml_src(name: str, signal: str = "air_c", unit: str = "C"):
    return src(signal=signal, fmt="senml", value_path=tuple(name.split(".")), time_path=None, unit=unit)


PACK = [
    {"bn": "urn:dev:mac:0024befffe804ff1:", "bt": 1_795_000_000, "bu": "Cel", "n": "air", "v": -24.5},
    {"n": "coil", "v": -31.0, "t": -60},
    {"n": "door", "vb": True, "u": None},
    {"n": "humidity", "u": "%RH", "v": 71},
]


def test_a_senml_pack_resolves_base_name_time_and_unit():
    """RFC 8428: full name bn + n, time bt + t, unit u or else bu; the named record is taken
    and the others are counted as ignored (example pack written from the RFC's section 5)."""
    r = parse(senml_src("urn:dev:mac:0024befffe804ff1:coil"), json.dumps(PACK).encode())
    assert (r.value, r.ts, r.ignored) == (-31.0, 1_795_000_000 - 60, 3)
    kelvin = [{"bn": "f1/", "n": "t", "u": "K", "v": 249.15, "bt": 1_795_000_000}]
    assert parse(senml_src("f1/t"), json.dumps(kelvin).encode()).value == pytest.approx(-24.0)
    door = parse(senml_src("urn:dev:mac:0024befffe804ff1:door", signal="door"), json.dumps(PACK).encode())
    assert door.value == 1.0


def test_a_senml_series_becomes_one_reading_per_record():
    """A gateway's pack with a series of one record (bt plus t offsets): each record a reading
    at its own time; the other names counted once; one bad value refuses the whole pack (it is
    kept whole as the rejection)."""
    from watcher.ingest.payload import parse_readings

    series = [{"bn": "gw1/", "bt": 1_795_000_000, "bu": "Cel", "n": "air", "v": -24.0, "t": -120}]
    series += [{"n": "air", "v": -23.5, "t": -60}, {"n": "air", "v": -23.0}, {"n": "rh", "u": "%RH", "v": 80}]
    readings = parse_readings(
        senml_src("gw1/air"), {"zone": "bulk-a", "sensor": "s1"}, json.dumps(series).encode(), NOW, DEFAULT_LIMITS
    )
    assert [(r.ts, r.value) for r in readings] == [
        (1_795_000_000 - 120, -24.0),
        (1_795_000_000 - 60, -23.5),
        (1_795_000_000, -23.0),
    ]
    assert [r.ignored for r in readings] == [1, 0, 0]
    with pytest.raises(Rejected, match="3 readings in one message where one was expected"):
        parse(senml_src("gw1/air"), json.dumps(series).encode())
    series[1]["v"] = "warm"
    with pytest.raises(Rejected, match="v is 'warm'"):
        parse_readings(
            senml_src("gw1/air"), {"zone": "bulk-a", "sensor": "s1"}, json.dumps(series).encode(), NOW, DEFAULT_LIMITS
        )


def test_senml_relative_and_absent_times_count_from_the_receive_time():
    """Times under 2**28 are relative to now (RFC 8428 4.5.3); none at all is now."""
    pack = [{"n": "t1", "v": -20.0, "t": -30}, {"n": "t2", "v": -21.0}]
    assert parse(senml_src("t1"), json.dumps(pack).encode()).ts == NOW - 30
    assert parse(senml_src("t2"), json.dumps(pack).encode()).ts == NOW


@pytest.mark.parametrize(
    ("pack", "name", "reason"),
    [
        (PACK, "urn:dev:mac:0024befffe804ff1:humidity", "unit '%RH' is not a temperature unit"),
        (PACK, "air", "no SenML record named 'air' \\(the pack has 'urn:dev"),
        ({"n": "a", "v": 1}, "a", "not a non-empty JSON array"),
        ([{"n": "a", "v": "cold"}], "a", "v is 'cold', expected a finite number"),
        ([{"bn": 5, "n": "a", "v": 1}], "a", "bn is 5, expected a string"),
        ([{"n": "a", "u": "degF", "v": 1}], "a", "unit 'degF' is not a temperature unit"),
    ],
)
def test_a_senml_pack_that_does_not_give_the_record_is_refused_with_the_reason(pack, name, reason):
    """A humidity unit, a missing record, no array, a text value, a bad base name, an
    unregistered unit: each refused with what was wrong."""
    with pytest.raises(Rejected, match=reason):
        parse(senml_src(name), json.dumps(pack).encode())


def spb_src(name: str, signal: str = "air_c"):
    return src(
        pattern=parse_pattern("spBv1.0/kestrel/DDATA/{zone}/{sensor}"),
        signal=signal,
        fmt="sparkplug",
        value_path=(name,),
        time_path=None,
    )


def test_sparkplug_data_by_name_by_alias_and_typed_values():
    """DDATA metrics picked by name, or by the alias a DBIRTH gave (a node's NBIRTH aliases
    serve its devices too); a signed Int32 read as two's complement; the metric's own
    timestamp (ms) first, else the payload's; the other metrics counted as ignored."""
    from tests import sparkplug_encode as enc
    from watcher.ingest.sparkplug import AliasBook, decode

    topic = "spBv1.0/kestrel/DDATA/bulk-a/probe7"
    data = enc.payload(
        [enc.metric("Air", value=-24.5, timestamp_ms=1_795_000_000_000), enc.metric("Fan", value=True, kind="boolean")],
        timestamp_ms=1_795_000_060_000,
    )
    r = parse_message(spb_src("Air"), {"zone": "bulk-a", "sensor": "probe7"}, data, NOW, DEFAULT_LIMITS, topic)
    assert (r.value, r.ts, r.ignored) == (-24.5, 1_795_000_000.0, 1)
    book = AliasBook()
    birth = enc.payload(
        [enc.metric("Air", alias=3, value=-25.0), enc.metric("Door", alias=4, value=False, kind="boolean")]
    )
    learnt = book.learn("spBv1.0/kestrel/DBIRTH/bulk-a/probe7", decode(birth))
    assert learnt == ("kestrel/bulk-a/probe7", {3: "Air", 4: "Door"})
    assert AliasBook({learnt[0]: learnt[1]}).name_of(topic, 4) == "Door"  # as reloaded from the store
    by_alias = enc.payload([enc.metric(alias=3, value=-19, kind="int32")], timestamp_ms=1_795_000_120_000)
    r = parse_message(
        spb_src("Air"), {"zone": "bulk-a", "sensor": "probe7"}, by_alias, NOW, DEFAULT_LIMITS, topic, book
    )
    assert (r.value, r.ts) == (-19.0, 1_795_000_120.0)
    door = enc.payload([enc.metric(alias=4, value=True, kind="boolean")])
    assert (
        parse_message(
            spb_src("Door", "door"), {"zone": "bulk-a", "sensor": "d"}, door, NOW, DEFAULT_LIMITS, topic, book
        ).value
        == 1.0
    )


@pytest.mark.parametrize(
    ("data", "reason"),
    [
        (b"\x12\x05\x0a\x03Ai", "ends inside a field"),
        (b"\x0b", "wire type 3"),
        (b"\x12\x02\x10\x09", "no Sparkplug metric named 'Air'; 1 metric\\(s\\) carry only an alias"),
        (b"\xff\xff\xff", "ends inside a number"),
    ],
)
def test_a_malformed_or_unresolvable_sparkplug_payload_is_refused_with_the_reason(data, reason):
    """Truncated fields, an impossible wire type, an alias no birth named, a broken varint."""
    with pytest.raises(Rejected, match=reason):
        parse_message(
            spb_src("Air"),
            {"zone": "bulk-a", "sensor": "s"},
            data,
            NOW,
            DEFAULT_LIMITS,
            "spBv1.0/kestrel/DDATA/bulk-a/s",
        )


def test_a_zone_template_names_the_zone_from_the_topic(tmp_path):
    """A central watcher reads several sites whose zones share names: the source's zone
    template ("{site}-{zone}") makes the zone id from the topic's placeholders, so
    fleet/kestrel/bulk-a/... and fleet/harbour/bulk-a/... are two zones; a topic whose made-up
    zone is not configured is refused with its name."""
    from watcher.config import config_from_dict
    from watcher.engine.route import readings_of
    from watcher.ingest.message import Message

    (tmp_path / "pw").write_text("x\n")
    cfg = config_from_dict(
        {
            "broker": {"password_file": str(tmp_path / "pw")},
            "storage": {"path": str(tmp_path / "w.db")},
            "sites": [{"id": "kestrel"}, {"id": "harbour"}],
            "zones": [
                {"id": "kestrel-bulk-a", "site": "kestrel", "setpoint_c": -25.0},
                {"id": "harbour-bulk-a", "site": "harbour", "setpoint_c": -25.0},
            ],
            "sources": [
                {"pattern": "fleet/{site}/{zone}/{sensor}/air", "zone": "{site}-{zone}", "signal": "air_c"},
            ],
        },
        "central.toml",
    )
    known = {z.id for z in cfg.zones}.__contains__
    for site in ("kestrel", "harbour"):
        msg = Message(f"fleet/{site}/bulk-a/s1/air", b'{"value": -24.5}', NOW, 0, 1)
        (r,) = readings_of(cfg, msg, known)
        assert (r.zone, r.sensor, r.value) == (f"{site}-bulk-a", "s1", -24.5)
    with pytest.raises(Rejected, match="unknown zone 'depot-bulk-a'"):
        readings_of(cfg, Message("fleet/depot/bulk-a/s1/air", b'{"value": -24.5}', NOW, 0, 1), known)
