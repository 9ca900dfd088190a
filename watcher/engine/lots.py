"""Lots inside the engine: record their events, bring each lot's population up to date from
stored readings, and hand its figures to the alert rules. Runs in the writer's transaction.

A lot is advanced at the zone's analysis points (watcher.engine.monitor), over the air of each
zone it sat in, averaged into one-minute bins (the same air the event costs use), so a lot's
figures follow from its events and the stored readings alone: a restart, a replay or a late
event gives the same state (a late event or a late reading sends the lot back to its arrival,
recomputed in the next pass). A lot is only advanced as far as every zone it sat in has data.
"""

from __future__ import annotations

import logging
import math

import numpy as np

from watcher.engine.analysis import air_samples
from watcher.errors import InputError
from watcher.files.profiles import builtin_names, load_profile
from watcher.ingest.jsondoc import BadJson, load_json
from watcher.lots.events import LotEvent, check_next, last_zone, parse_event, stays
from watcher.lots.model import lot_figures, lot_spec, start_state
from watcher.model.integrator import State, advance
from watcher.store.db import Store
from watcher.store.zones import pack_state, unpack_state

log = logging.getLogger("watcher.lots")


def record_event(
    store: Store, config, doc, where: str, source: str, sender: str | None, received_ts: float
) -> LotEvent:
    """Validate a lot event against the configuration and the lot's history, then store it."""
    ev = parse_event(doc, where, {z.id for z in config.zones}, set(builtin_names()), received_ts)
    check_next(store.lots.history(ev.lot), ev, where)
    store.lots.event_add(ev, source, sender, received_ts)
    return ev


def parse_payload(payload: bytes, topic: str) -> dict:
    try:
        return load_json(payload)
    except BadJson as exc:
        raise InputError(f"lot event on {topic}", payload[:40], f"a JSON object ({exc})") from None


class LotKeeper:
    def __init__(self, config, store: Store):
        self.config = config
        self.store = store
        self._specs: dict[str, object] = {}

    def spec(self, product: str):
        if product not in self._specs:
            self._specs[product] = lot_spec(load_profile(product))
        return self._specs[product]

    def advance_zone(self, zone_id: str, at_ts: float, fed_of, now_ts: float) -> list[tuple[str, str, dict]]:
        """Bring the lots that sat in this zone up to at_ts (as far as their zones have data).
        Returns (lot, zone it is in, figures) for each lot that moved on."""
        out = []
        for lot in self.store.lots.touching(zone_id):
            done = self.bring_up(lot, at_ts, fed_of, now_ts)
            if done is not None:
                out.append((lot, *done))
        return out

    def bring_up(self, lot: str, target_ts: float, fed_of, now_ts: float) -> tuple[str, dict] | None:
        info = self.store.lots.info(lot)
        history = self.store.lots.history(lot)
        if info is None or not history:
            return None
        spec = self.spec(info["product"])
        row = self.store.lots.state_get(lot)
        periods = stays(history)
        if row is None:
            state = self.start(spec, info, periods)
        else:
            state = State.from_arrays(unpack_state(row[1]))
        start_t = state.time_ts
        state = self.walk(spec, state, periods, target_ts, fed_of)
        if state.time_ts == start_t and row is not None:
            return None
        figures = lot_figures(spec, state)
        self.store.lots.state_save(lot, state.time_ts, pack_state(state.arrays()), figures, now_ts)
        return last_zone(history), figures

    def walk(self, spec, state: State, periods, target_ts: float, fed_of) -> State:
        """Advance through the lot's stays up to target_ts, each zone only as far as it has data."""
        for zone, _, end in periods:
            if end is not None and end <= state.time_ts:
                continue
            state.setpoint_c[:] = self.config.zone(zone).setpoint_c
            reach = min(target_ts, fed_of(zone), math.inf if end is None else end)
            if reach <= state.time_ts:
                break
            state = self._advance(spec, state, zone, reach, exact_end=end is not None and reach == end)
            if end is None or state.time_ts < end:
                break
        return state

    def start(self, spec, info: dict, periods) -> State:
        zone0, t0, _ = periods[0]
        return start_state(spec, t0, self._air_before(zone0, t0), self.config.zone(zone0).setpoint_c, info["initial"])

    def _advance(self, spec, state: State, zone: str, reach_ts: float, exact_end: bool) -> State:
        t, air = air_samples(self.store, zone, state.time_ts, reach_ts)
        if exact_end and (t.size == 0 or t[-1] < reach_ts):  # the lot leaves the zone exactly then
            t = np.append(t, reach_ts)
            air = np.append(air, air[-1] if air.size else state.air_c[0])
        if t.size == 0:
            return state
        new, _ = advance(spec, state, t, air[None, :])
        return new

    def _air_before(self, zone: str, time_ts: float) -> float:
        rows = self.store.readings.signals(zone, ("air_c",), time_ts - 6 * 3600.0, time_ts)
        if rows:
            return float(rows[-1][3])
        return self.config.zone(zone).setpoint_c


def recompute_lot(config, store: Store, lot: str, target_ts: float) -> State:
    """A lot's state from its arrival to target_ts in one pass (what a restart must agree with)."""
    keeper = LotKeeper(config, store)
    info = store.lots.info(lot)
    spec = keeper.spec(info["product"])
    periods = stays(store.lots.history(lot))
    return keeper.walk(spec, keeper.start(spec, info, periods), periods, target_ts, lambda zone: math.inf)
