"""Sparkplug B payloads (Eclipse Sparkplug specification, version 3.0): the metrics of NBIRTH,
DBIRTH, NDATA and DDATA messages. Pure.

Topics are spBv1.0/<group>/<message type>/<edge node>[/<device>]. A payload is a protocol
buffer (schema: sparkplug_b.proto beside this module, the part watcher reads, written from the
specification): a timestamp (ms) and metrics, each with a name, or after the birth only an
alias, and a typed value. Births tell which alias stands for which name; AliasBook keeps that
per edge node and device. The decoder reads the protocol-buffer wire format itself (varints,
fixed 32/64-bit, length-delimited fields; unknown fields skipped), with every length checked,
so a malformed payload is a refusal with its reason, never an exception of another kind.
"""

from __future__ import annotations

import struct
from dataclasses import dataclass, field

from watcher.errors import Rejected

NAMESPACE = "spBv1.0"
BIRTHS = ("NBIRTH", "DBIRTH")
DATA = ("NDATA", "DDATA")
# Metric datatypes (specification, Payload.DataType): the ones a reading can be.
INT8, INT16, INT32, INT64, UINT8, UINT16, UINT32, UINT64, FLOAT, DOUBLE, BOOLEAN, STRING = range(1, 13)
TEXT = 14
SIGNED_BITS = {INT8: 8, INT16: 16, INT32: 32, INT64: 64}


@dataclass
class Metric:
    name: str | None = None
    alias: int | None = None
    timestamp_ms: int | None = None
    datatype: int | None = None
    is_null: bool = False
    raw: object = None  # the value as carried (int, float, bool or str); None when absent


@dataclass
class Payload:
    timestamp_ms: int | None = None
    metrics: list[Metric] = field(default_factory=list)
    seq: int | None = None


def _varint(data: bytes, i: int) -> tuple[int, int]:
    shift = value = 0
    while True:
        if i >= len(data):
            raise Rejected("Sparkplug payload ends inside a number (truncated?)")
        b = data[i]
        i += 1
        value |= (b & 0x7F) << shift
        if not b & 0x80:
            return value, i
        shift += 7
        if shift > 63:
            raise Rejected("Sparkplug payload has a number longer than 64 bits")


def _fields(data: bytes):
    """(field number, wire type, value) of one protocol-buffer message; a length-delimited
    value is its bytes."""
    i = 0
    while i < len(data):
        key, i = _varint(data, i)
        number, wire = key >> 3, key & 7
        if wire == 0:
            value, i = _varint(data, i)
        elif wire == 1:
            if i + 8 > len(data):
                raise Rejected("Sparkplug payload ends inside a 64-bit field")
            value, i = data[i : i + 8], i + 8
        elif wire == 2:
            n, i = _varint(data, i)
            if i + n > len(data):
                raise Rejected("Sparkplug payload ends inside a field (a length runs past the end)")
            value, i = data[i : i + n], i + n
        elif wire == 5:
            if i + 4 > len(data):
                raise Rejected("Sparkplug payload ends inside a 32-bit field")
            value, i = data[i : i + 4], i + 4
        else:
            raise Rejected(f"Sparkplug payload has wire type {wire}, which protocol buffers do not use here")
        yield number, wire, value


def _text(value) -> str:
    try:
        return bytes(value).decode("utf-8")
    except (UnicodeDecodeError, TypeError):
        raise Rejected("Sparkplug payload has a name or string that is not UTF-8") from None


def _metric(data: bytes) -> Metric:
    m = Metric()
    for number, wire, value in _fields(data):
        if number == 1 and wire == 2:
            m.name = _text(value)
        elif number == 2 and wire == 0:
            m.alias = value
        elif number == 3 and wire == 0:
            m.timestamp_ms = value
        elif number == 4 and wire == 0:
            m.datatype = value
        elif number == 7 and wire == 0:
            m.is_null = bool(value)
        elif number in (10, 11) and wire == 0:  # int_value (uint32), long_value (uint64)
            m.raw = value
        elif number == 12 and wire == 5:
            m.raw = struct.unpack("<f", value)[0]
        elif number == 13 and wire == 1:
            m.raw = struct.unpack("<d", value)[0]
        elif number == 14 and wire == 0:
            m.raw = bool(value)
        elif number == 15 and wire == 2:
            m.raw = _text(value)
    return m


def decode(data: bytes) -> Payload:
    """The payload's timestamp, sequence number and metrics; Rejected when malformed."""
    p = Payload()
    for number, wire, value in _fields(data):
        if number == 1 and wire == 0:
            p.timestamp_ms = value
        elif number == 2 and wire == 2:
            p.metrics.append(_metric(value))
        elif number == 3 and wire == 0:
            p.seq = value
    return p


def value_of(m: Metric) -> object:
    """The metric's value as a reading takes it: signed integers read as two's complement at
    their width (the specification carries them in unsigned fields)."""
    if m.is_null or m.raw is None:
        raise Rejected(f"Sparkplug metric {m.name or m.alias!r} has no value (null)")
    if isinstance(m.raw, int) and not isinstance(m.raw, bool) and m.datatype in SIGNED_BITS:
        bits = SIGNED_BITS[m.datatype]
        raw = m.raw & ((1 << bits) - 1)
        return raw - (1 << bits) if raw >> (bits - 1) else raw
    return m.raw


def topic_parts(topic: str) -> tuple[str, str, str, str | None] | None:
    """(group, message type, edge node, device or None) of a Sparkplug B topic, else None."""
    levels = topic.split("/")
    if len(levels) not in (4, 5) or levels[0] != NAMESPACE:
        return None
    return levels[1], levels[2], levels[3], levels[4] if len(levels) == 5 else None


class AliasBook:
    """Which alias stands for which metric name, per (group, edge node, device), from births.
    A device's data may also use its node's aliases."""

    def __init__(self, known: dict[str, dict[int, str]] | None = None) -> None:
        """known: what earlier births said, by key ("group/edge[/device]", as `learn` returns)."""
        self._names: dict[tuple, dict[int, str]] = {}
        for key, names in (known or {}).items():
            group, edge, *device = key.split("/")
            self._names[(group, edge, device[0] if device else None)] = dict(names)

    def learn(self, topic: str, payload: Payload) -> tuple[str, dict[int, str]] | None:
        """Take a birth's aliases (they replace what the last birth of that node or device
        said); returns (key, {alias: name}) to keep, None for a topic that is no birth."""
        parts = topic_parts(topic)
        if parts is None or parts[1] not in BIRTHS:
            return None
        group, _, edge, device = parts
        book = {m.alias: m.name for m in payload.metrics if m.name is not None and m.alias is not None}
        self._names[(group, edge, device)] = book
        return "/".join(x for x in (group, edge, device) if x is not None), dict(book)

    def name_of(self, topic: str, alias: int) -> str | None:
        parts = topic_parts(topic)
        if parts is None:
            return None
        group, _, edge, device = parts
        for key in ((group, edge, device), (group, edge, None)):
            name = self._names.get(key, {}).get(alias)
            if name is not None:
                return name
        return None


def records(payload: Payload, name: str, topic: str, aliases: AliasBook | None) -> tuple[list[tuple], int]:
    """([(value, time in epoch seconds or None)] of every metric called `name` (one, or a
    series of historical values), metrics of other names ignored)."""

    def resolved(m: Metric) -> str | None:
        if m.name is not None:
            return m.name
        return aliases.name_of(topic, m.alias) if aliases is not None and m.alias is not None else None

    names = [resolved(m) for m in payload.metrics]
    mine = [m for m, n in zip(payload.metrics, names) if n == name]
    if not mine:
        unnamed = sum(n is None for n in names)
        hint = (
            f"; {unnamed} metric(s) carry only an alias no birth certificate has named yet (the edge node sends "
            "one when it connects; a rebirth request makes it send one now)"
            if unnamed
            else ""
        )
        raise Rejected(f"no Sparkplug metric named {name!r}{hint}")
    out = []
    for m in mine:
        stamp_ms = m.timestamp_ms if m.timestamp_ms is not None else payload.timestamp_ms
        out.append((value_of(m), None if stamp_ms is None else stamp_ms / 1000.0))
    return out, len(payload.metrics) - len(mine)
