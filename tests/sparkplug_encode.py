"""A Sparkplug B payload encoder for the tests, written from the specification's schema
(watcher/ingest/sparkplug_b.proto), separately from watcher's decoder."""

from __future__ import annotations

import struct

DATATYPES = {"int32": 3, "int64": 4, "uint32": 7, "float": 9, "double": 10, "boolean": 11, "string": 12}


def _varint(n: int) -> bytes:
    out = bytearray()
    while True:
        b = n & 0x7F
        n >>= 7
        out.append(b | (0x80 if n else 0))
        if not n:
            return bytes(out)


def _key(number: int, wire: int) -> bytes:
    return _varint(number << 3 | wire)


def _bytes(number: int, data: bytes) -> bytes:
    return _key(number, 2) + _varint(len(data)) + data


def metric(name=None, alias=None, value=None, kind="double", timestamp_ms=None, null=False) -> bytes:
    out = b""
    if name is not None:
        out += _bytes(1, name.encode())
    if alias is not None:
        out += _key(2, 0) + _varint(alias)
    if timestamp_ms is not None:
        out += _key(3, 0) + _varint(timestamp_ms)
    out += _key(4, 0) + _varint(DATATYPES[kind])
    if null:
        out += _key(7, 0) + _varint(1)
    elif value is not None:
        if kind == "int32":
            out += _key(10, 0) + _varint(value & 0xFFFFFFFF)  # two's complement in a uint32
        elif kind in ("int64", "uint32"):
            out += _key(11 if kind == "int64" else 10, 0) + _varint(value & 0xFFFFFFFFFFFFFFFF)
        elif kind == "float":
            out += _key(12, 5) + struct.pack("<f", value)
        elif kind == "double":
            out += _key(13, 1) + struct.pack("<d", value)
        elif kind == "boolean":
            out += _key(14, 0) + _varint(int(value))
        elif kind == "string":
            out += _bytes(15, value.encode())
    return out


def payload(metrics: list[bytes], timestamp_ms: int | None = None, seq: int = 0) -> bytes:
    out = b"" if timestamp_ms is None else _key(1, 0) + _varint(timestamp_ms)
    for m in metrics:
        out += _bytes(2, m)
    return out + _key(3, 0) + _varint(seq)
