"""Lot events: a lot arrives in a zone, moves to another, departs. Pure validation, shared by
the MQTT topic, the `watcher lot` commands and the CSV import, so all three refuse the same
things with the same words.

The JSON form (the MQTT payload; the CLI and CSV build the same dict):
    {"event": "arrive", "lot": "L-2291", "zone": "bulk-a", "time": "2026-11-20T08:00:00Z",
     "product": "dairy-ice-cream", "initial": {"budget_used_pct": 35}, "note": "from hardening"}
    {"event": "move", "lot": "L-2291", "zone": "dispatch", "time": ...}
    {"event": "depart", "lot": "L-2291", "time": ...}
`time` is ISO 8601 (UTC when it has no offset) or epoch seconds; without it, the time received.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from datetime import UTC, datetime

from watcher.errors import InputError
from watcher.ingest.jsondoc import storable
from watcher.lots.model import parse_initial

KINDS = ("arrive", "move", "depart")
LATEST_S = 253402300799.0  # 9999-12-31T23:59:59Z, the last second an ISO 8601 date can name
_LOT_ID = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._:-]{0,63}$")


@dataclass(frozen=True)
class LotEvent:
    kind: str
    lot: str
    ts: float
    zone: str | None = None
    product: str | None = None
    initial: dict = field(default_factory=lambda: {"kind": "fresh"})
    note: str | None = None


def parse_time(raw, where: str, received_ts: float) -> float:
    if raw is None:
        return received_ts
    if isinstance(raw, (int, float)) and not isinstance(raw, bool) and math.isfinite(raw):
        if not 0.0 <= raw <= LATEST_S:
            raise InputError(f"{where}: time", str(raw)[:40], "epoch seconds between 1970 and 9999")
        return float(raw)
    if isinstance(raw, str):
        try:
            stamp = datetime.fromisoformat(raw[:-1] + "+00:00" if raw.endswith("Z") else raw)
        except ValueError:
            pass
        else:
            return (stamp if stamp.tzinfo else stamp.replace(tzinfo=UTC)).timestamp()
    raise InputError(f"{where}: time", str(raw)[:40], "ISO 8601 or epoch seconds")


def parse_event(doc, where: str, zones: set[str], products: set[str], received_ts: float) -> LotEvent:
    """One lot event from its JSON-shaped dict; InputError naming the field otherwise."""
    if not isinstance(doc, dict):
        raise InputError(where, str(doc)[:60], "a JSON object with event, lot, zone, time")
    kind = doc.get("event")
    if kind not in KINDS:
        raise InputError(f"{where}: event", str(kind)[:20], "one of " + ", ".join(KINDS))
    lot = doc.get("lot")
    if not isinstance(lot, str) or not _LOT_ID.match(lot):
        raise InputError(f"{where}: lot", str(lot)[:70], "1-64 letters, digits, '.', '_', ':' or '-'")
    zone = doc.get("zone")
    if kind == "depart":
        if zone is not None and zone not in zones:
            raise InputError(f"{where}: zone", str(zone)[:64], "one of the configured zones")
        zone = None
    elif zone not in zones:
        raise InputError(f"{where}: zone", str(zone)[:64], "one of " + ", ".join(sorted(zones)))
    ts = parse_time(doc.get("time"), where, received_ts)
    if ts > received_ts + 300.0:
        raise InputError(f"{where}: time", _when(ts), "a time no more than 300 s ahead of the clock")
    product = doc.get("product")
    if kind == "arrive":
        product = product or "dairy-ice-cream"
        if product not in products:
            raise InputError(f"{where}: product", str(product)[:64], "one of " + ", ".join(sorted(products)))
        initial = parse_initial(doc.get("initial"), where)
    elif product is not None or doc.get("initial") is not None:
        raise InputError(f"{where}: product/initial", kind, "product and initial on the arrive event only")
    else:
        initial = {"kind": "fresh"}
    note = doc.get("note")
    if note is not None and (not isinstance(note, str) or len(note) > 500 or not storable(note)):
        raise InputError(f"{where}: note", str(note)[:40], "text of at most 500 characters")
    return LotEvent(kind, lot, ts, zone, product, initial, note)


def check_next(history: list[tuple[str, str | None, float]], ev: LotEvent, where: str) -> None:
    """Refuse an event that does not follow the lot's history [(kind, zone, ts), ...]."""
    if ev.kind == "arrive":
        if history:
            raise InputError(
                f"{where}: lot", ev.lot, f"a new lot id (this one arrived {_when(history[0][2])}; ids are not reused)"
            )
        return
    if not history:
        raise InputError(f"{where}: lot", ev.lot, "a lot that has arrived (record its arrival first)")
    kind, zone, ts = history[-1]
    if kind == "depart":
        raise InputError(f"{where}: lot", ev.lot, f"a lot still in store (it departed at {_when(ts)})")
    if ev.ts < ts:
        raise InputError(f"{where}: time", _when(ev.ts), f"a time after the lot's last event ({kind} at {_when(ts)})")
    if ev.kind == "move" and ev.zone == zone:
        raise InputError(f"{where}: zone", zone, f"a zone other than the one lot {ev.lot} is in")


def stays(history: list[tuple[str, str | None, float]]) -> list[tuple[str, float, float | None]]:
    """(zone, from, to) for each stay; `to` is None for the zone the lot is in now."""
    out: list[tuple[str, float, float | None]] = []
    for kind, zone, ts in history:
        if out and out[-1][2] is None:
            out[-1] = (out[-1][0], out[-1][1], ts)
        if kind in ("arrive", "move"):
            out.append((zone, ts, None))
    return out


def last_zone(history: list[tuple[str, str | None, float]]) -> str | None:
    """The zone the lot is in now, or the one it left from when it departed."""
    return next((zone for _, zone, _ in reversed(history) if zone is not None), None)


def _when(ts: float) -> str:
    return datetime.fromtimestamp(ts, UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
