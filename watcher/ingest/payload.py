"""Turn one MQTT message into a normalised reading, or a rejection with its reason. Pure.

A reading is (zone, sensor, signal, ts, value): ts in UTC epoch seconds, temperatures in °C,
door and defrost states as 1.0 (open / on) or 0.0 (closed / off).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import NamedTuple

from watcher.declare import setting
from watcher.errors import OutOfClock, Rejected
from watcher.ingest import senml, sparkplug
from watcher.ingest.jsondoc import BadJson, load_json
from watcher.ingest.topics import fill_template

__all__ = [
    "FORMATS",
    "OutOfClock",
    "PayloadFormat",
    "Reading",
    "Rejected",
    "Source",
    "Limits",
    "parse_message",
    "parse_readings",
]

SIGNALS = ("air_c", "product_c", "door", "defrost")
TEMPERATURE_SIGNALS = ("air_c", "product_c")
_UNIT_WORDS = {"c": "C", "degc": "C", "°c": "C", "celsius": "C", "f": "F", "degf": "F", "°f": "F", "fahrenheit": "F"}
_UNIT_WORDS |= {"k": "K", "kelvin": "K"}
_STATE_WORDS = {"open": 1.0, "on": 1.0, "true": 1.0, "closed": 0.0, "close": 0.0, "off": 0.0, "false": 0.0}


@dataclass(frozen=True)
class Source:
    """How one topic pattern's messages are read (validated by watcher.config)."""

    pattern: object  # TopicPattern
    signal: str
    fmt: str = "json"  # a FORMATS name
    value_path: tuple[str, ...] = ("value",)
    unit: str = "C"  # "C", "F" or "K"
    unit_path: tuple[str, ...] | None = None  # the payload names its unit here (else `unit` applies)
    time_path: tuple[str, ...] | None = None
    time_format: str = "iso"  # "iso", "epoch_s" or "epoch_ms"
    zone: str | None = None  # fixed zone when the pattern has no {zone}, or a template ("{site}-{zone}")
    sensor: str | None = None  # fixed sensor when the pattern has no {sensor}


@dataclass(frozen=True)
class Reading:
    zone: str
    sensor: str
    signal: str
    ts: float
    value: float
    ignored: int = field(default=0, compare=False)  # other records of the message, not taken (SenML)


@dataclass(frozen=True)
class Limits:
    max_payload_bytes: int = setting(65536, "larger payloads are rejected", lo=64, hi=16 * 1024 * 1024)
    future_skew_s: float = setting(
        300.0, "timestamps further ahead of the receive time are rejected", lo=0.0, hi=86400.0
    )
    past_limit_s: float = setting(
        400 * 86400.0,
        "timestamps older than this are rejected (days)",
        key="past_limit_days",
        scale=86400.0,
        lo=1.0,
        hi=36500.0,
    )
    temp_range_c: tuple[float, float] = (-60.0, 40.0)  # read from temperature_range_c = [low, high]


def _dig(obj, path: tuple[str, ...], what: str):
    for key in path:
        if isinstance(obj, dict) and key in obj:
            obj = obj[key]
        elif isinstance(obj, list) and key.isdigit() and int(key) < len(obj):
            obj = obj[int(key)]
        else:
            raise Rejected(f"missing field {'.'.join(path)} ({what})")
    return obj


def _to_celsius(value: float, unit: str) -> float:
    if unit == "F":
        return (value - 32.0) * 5.0 / 9.0
    if unit == "K":
        return value - 273.15
    return value


def _number(raw, what: str) -> float:
    if isinstance(raw, bool) or not isinstance(raw, (int, float)):
        raise Rejected(f"{what} is {type(raw).__name__}, expected a number")
    try:
        value = float(raw)
    except OverflowError:
        raise Rejected(f"{what} is too large to be a number") from None
    if not math.isfinite(value):
        raise Rejected(f"{what} is not finite")
    return value


def _unit(raw) -> str:
    if isinstance(raw, str) and raw.strip().lower() in _UNIT_WORDS:
        return _UNIT_WORDS[raw.strip().lower()]
    raise Rejected(f"unit {str(raw)[:20]!r} is not one of C, F, K (or degC, celsius, ...)")


def _state(raw) -> float:
    if isinstance(raw, bool):
        return 1.0 if raw else 0.0
    if isinstance(raw, (int, float)) and raw in (0, 1):
        return float(raw)
    if isinstance(raw, str) and raw.strip().lower() in _STATE_WORDS:
        return _STATE_WORDS[raw.strip().lower()]
    raise Rejected(f"state {raw!r} is not open/closed, on/off, true/false or 1/0")


def _timestamp(raw, fmt: str) -> float:
    if fmt == "iso":
        if not isinstance(raw, str):
            raise Rejected("timestamp is not an ISO 8601 string")
        try:
            stamp = datetime.fromisoformat(raw[:-1] + "+00:00" if raw.endswith("Z") else raw)
        except ValueError:
            raise Rejected(f"timestamp {raw[:40]!r} is not ISO 8601") from None
        if stamp.tzinfo is None:
            stamp = stamp.replace(tzinfo=UTC)
        return stamp.timestamp()
    value = _number(raw, "timestamp")
    return value / 1000.0 if fmt == "epoch_ms" else value


class Raw(NamedTuple):
    """What a payload format read: the value as written, its unit, the reading's own time
    (None: the receive time) and how many other records of the message it left (SenML,
    Sparkplug)."""

    value: object
    unit: str
    ts: float | None
    ignored: int = 0


class Inbound(NamedTuple):
    """One message as a payload format sees it (a tuple: one is made per message)."""

    payload: bytes
    received_ts: float
    topic: str = ""
    aliases: object = None  # sparkplug.AliasBook of the births seen, for Sparkplug sources


def _utf8(m: Inbound) -> str:
    try:
        return m.payload.decode("utf-8")
    except UnicodeDecodeError:
        raise Rejected("payload is not UTF-8") from None


@dataclass(frozen=True)
class PayloadFormat:
    """One way a payload carries its value: read(source, inbound) gives a Raw (or a list of
    them, a series), or raises Rejected."""

    name: str
    read: Callable[[Source, Inbound], Raw | list[Raw]]
    fields: bool  # the payload has named fields (value, unit and time paths apply)
    describe: Callable[[Source], str]  # for `watcher check-config`


def _read_number(source: Source, m: Inbound) -> Raw:
    text = _utf8(m)
    try:
        raw = float(text.strip())
    except ValueError:
        raise Rejected(f"payload {text[:40]!r} is not a number") from None
    if not math.isfinite(raw):
        raise Rejected("value is not finite")
    return Raw(raw, source.unit, None)


def _read_text(source: Source, m: Inbound) -> Raw:
    """A bare payload: a number, or for a door or defrost a state word (open/closed, on/off,
    true/false, 1/0, any case). What it is not is said by the value's own check."""
    word = _utf8(m).strip()
    try:
        return Raw(float(word), source.unit, None)
    except ValueError:
        if source.signal in TEMPERATURE_SIGNALS:
            raise Rejected(f"payload {word[:40]!r} is not a number") from None
        return Raw(word, source.unit, None)


def _json(m: Inbound):
    try:  # load_json says "payload is not UTF-8" itself
        return load_json(m.payload)
    except BadJson as exc:
        raise Rejected(str(exc)) from None


def _read_json(source: Source, m: Inbound) -> Raw:
    doc = _json(m)
    unit = source.unit if source.unit_path is None else _unit(_dig(doc, source.unit_path, "unit"))
    ts = None if source.time_path is None else _timestamp(_dig(doc, source.time_path, "timestamp"), source.time_format)
    return Raw(_dig(doc, source.value_path, "value"), unit, ts)


def _read_senml(source: Source, m: Inbound) -> list[Raw]:
    found, ignored = senml.records(
        _json(m), ".".join(source.value_path), source.signal in TEMPERATURE_SIGNALS, m.received_ts
    )
    return [
        Raw(value, source.unit if unit is None else unit, ts, ignored if i == 0 else 0)
        for i, (value, unit, ts) in enumerate(found)
    ]


def _read_sparkplug(source: Source, m: Inbound) -> list[Raw]:
    found, ignored = sparkplug.records(sparkplug.decode(m.payload), ".".join(source.value_path), m.topic, m.aliases)
    return [Raw(value, source.unit, ts, ignored if i == 0 else 0) for i, (value, ts) in enumerate(found)]


FORMATS = {
    f.name: f
    for f in (
        PayloadFormat("json", _read_json, True, lambda s: f"JSON field {'.'.join(s.value_path)}"),
        PayloadFormat("number", _read_number, False, lambda s: "plain number"),
        PayloadFormat("senml", _read_senml, False, lambda s: f"SenML record {'.'.join(s.value_path)!r}"),
        PayloadFormat("sparkplug", _read_sparkplug, False, lambda s: f"Sparkplug B metric {'.'.join(s.value_path)!r}"),
        PayloadFormat(
            "text",
            _read_text,
            False,
            lambda s: "bare number" if s.signal in TEMPERATURE_SIGNALS else "bare state word or number",
        ),
    )
}


def parse_readings(
    source: Source,
    names: dict[str, str],
    payload: bytes,
    received_ts: float,
    limits: Limits,
    topic: str = "",
    aliases=None,
) -> list[Reading]:
    """The readings of one message (one, or a series of one SenML record or Sparkplug metric),
    or Rejected with the reason: one bad value refuses the whole message, which is kept whole
    as the rejection. topic and aliases: for Sparkplug sources, whose data may name metrics by
    the aliases their births gave."""
    if len(payload) > limits.max_payload_bytes:
        raise Rejected(f"payload of {len(payload)} bytes exceeds {limits.max_payload_bytes}")
    raws = FORMATS[source.fmt].read(source, Inbound(payload, received_ts, topic, aliases))
    return [_reading(source, names, raw, received_ts, limits) for raw in ([raws] if isinstance(raws, Raw) else raws)]


def parse_message(*args, **kwargs) -> Reading:
    """The one reading of a message that carries one (parse_readings' arguments; Rejected
    when it carries a series)."""
    readings = parse_readings(*args, **kwargs)
    if len(readings) != 1:
        raise Rejected(f"{len(readings)} readings in one message where one was expected")
    return readings[0]


def zone_of(source: Source, names: dict[str, str]) -> str | None:
    """The zone a topic matched by `source` names: the source's zone template filled with the
    topic's placeholders, else the topic's {zone}, else the source's fixed zone."""
    if source.zone and "{" in source.zone:  # a template of the topic's placeholders (checked by the config)
        return fill_template(source.zone, names)
    return names.get("zone") or source.zone


def _reading(source: Source, names: dict[str, str], raw: Raw, received_ts: float, limits: Limits) -> Reading:
    value_raw, unit, ts, ignored = raw
    ts = received_ts if ts is None else ts
    if source.signal in TEMPERATURE_SIGNALS:
        value = _to_celsius(_number(value_raw, "value"), unit)
        lo, hi = limits.temp_range_c
        if not lo <= value <= hi:
            raise Rejected(f"temperature {value:.2f} C outside the plausible range [{lo}, {hi}] (sensor fault?)")
    else:
        value = _state(value_raw)
    if not math.isfinite(ts):
        raise Rejected("timestamp is not finite")
    if ts > received_ts + limits.future_skew_s:
        raise OutOfClock(f"timestamp {ts - received_ts:.0f} s in the future (tolerance {limits.future_skew_s:.0f} s)")
    if ts < received_ts - limits.past_limit_s:
        raise OutOfClock(f"timestamp {(received_ts - ts) / 86400:.0f} days in the past")
    zone = zone_of(source, names)
    sensor = names.get("sensor") or source.sensor or source.signal
    # Microseconds: readings stamped with the receive time must not collide in the natural key.
    return Reading(zone=zone, sensor=sensor, signal=source.signal, ts=round(ts, 6), value=value, ignored=ignored)
