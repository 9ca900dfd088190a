"""SenML packs (RFC 8428, JSON representation): one named record out of a pack. Pure.

A pack is an array of records. Base fields (bn base name, bt base time, bu base unit, bv
base value) apply to their own record and every later one until set again. A record's full
name is bn + n, its time bt + t (a resolved time under 2**28 is relative to now: the receive
time, as RFC 8428 section 4.5.3 says), its unit u or else bu, its value bv + v, or vb (a
boolean) or vs (a string). Units are taken from the SenML registry: Cel and K; a temperature
in any other unit is refused rather than guessed.
"""

from __future__ import annotations

import math

from watcher.errors import Rejected

RELATIVE_BELOW = 2.0**28  # RFC 8428 4.5.3: times below this are relative to "now"
TEMPERATURE_UNITS = {"Cel": "C", "K": "K"}  # the SenML units registry's temperature units
MAX_RECORDS = 10_000


def _num(rec: dict, key: str, where: str) -> float:
    value = rec.get(key, 0.0)
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise Rejected(f"{where}: {key} is {value!r}, expected a finite number")
    return float(value)


def resolve(pack) -> list[dict]:
    """Every record with its base fields applied: name, time (None: relative 0), unit, value
    (number, bool or str; None when the record carries none)."""
    if not isinstance(pack, list) or not pack:
        raise Rejected("SenML pack is not a non-empty JSON array of records")
    if len(pack) > MAX_RECORDS:
        raise Rejected(f"SenML pack of {len(pack)} records exceeds {MAX_RECORDS}")
    bn, bt, bu, bv = "", 0.0, None, 0.0
    out = []
    for i, rec in enumerate(pack):
        where = f"SenML record {i}"
        if not isinstance(rec, dict):
            raise Rejected(f"{where} is not a JSON object")
        if "bn" in rec:
            if not isinstance(rec["bn"], str):
                raise Rejected(f"{where}: bn is {rec['bn']!r}, expected a string")
            bn = rec["bn"]
        if "bt" in rec:
            bt = _num(rec, "bt", where)
        if "bu" in rec:
            bu = rec["bu"]
        if "bv" in rec:
            bv = _num(rec, "bv", where)
        name = rec.get("n", "")
        if not isinstance(name, str):
            raise Rejected(f"{where}: n is {name!r}, expected a string")
        if "v" in rec:
            value: object = bv + _num(rec, "v", where)
        elif "vb" in rec:
            value = rec["vb"]
        elif "vs" in rec:
            value = rec["vs"]
        else:
            value = None
        out.append({"name": bn + name, "time": bt + _num(rec, "t", where), "unit": rec.get("u", bu), "value": value})
    return out


def records(pack, name: str, temperature: bool, received_ts: float) -> tuple[list[tuple], int]:
    """([(value, unit or None, time)] of every record called `name` in the pack (one, or a
    series), records of other names ignored).

    temperature: each value must be a number in a SenML temperature unit (or none, when the
    source's configured unit applies)."""
    valued = [r for r in resolve(pack) if r["value"] is not None]
    mine = [r for r in valued if r["name"] == name]
    if not mine:
        names = sorted({r["name"] for r in valued})[:5]
        raise Rejected(f"no SenML record named {name!r} (the pack has {', '.join(map(repr, names)) or 'no values'})")
    out = []
    for rec in mine:
        unit = rec["unit"]
        if temperature:
            if unit is not None and unit not in TEMPERATURE_UNITS:
                raise Rejected(f"SenML record {name!r}: unit {unit!r} is not a temperature unit (Cel or K)")
            unit = None if unit is None else TEMPERATURE_UNITS[unit]
        ts = rec["time"]
        out.append((rec["value"], unit, received_ts + ts if ts < RELATIVE_BELOW else ts))
    return out, len(valued) - len(mine)
