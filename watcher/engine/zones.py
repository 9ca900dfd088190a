"""One runner per zone: orders readings, merges sensors, feeds the one integrator.

Readings of the model signals (air_c, product_c) wait in a reorder buffer until the zone's
newest stored reading is `reorder_window_s` ahead of them, then feed the integrator in time
order. Several air sensors in a zone are averaged over those reporting within `max_gap_s`; with
none fresh the last values are held (the gap policy) and a data gap is recorded. A reading that
arrives after its time has been fed is stored flagged `late`, and the zone is recomputed from
its stored readings, so live state never silently diverges from the record.
Everything here is deterministic in the stored readings: a zone rebuilt from the database after
a crash equals the live one.
"""

from __future__ import annotations

import math
from collections import defaultdict

import numpy as np

from watcher.config import Zone
from watcher.ingest.payload import Reading
from watcher.model.ahead import trace_figures
from watcher.model.integrator import Spec, State, advance, new_state, outputs
from watcher.ranges import RANGE_KEYS
from watcher.simulation import position_rows, worst_position

MODEL_SIGNALS = ("air_c", "product_c")


def spec_key(zone: Zone) -> str:
    """Changes whenever a setting that shapes the zone's state changes (then it is recomputed)."""
    pos = ";".join(f"{p.name}:{p.tau_s:g}:{int(p.probe)}" for p in zone.positions)
    k = zone.profile.kinetics
    return f"{zone.profile.name}|{k.k_ref_um3_per_day:g}|{k.activation_energy_kj_per_mol:g}|{zone.setpoint_c:g}|{pos}"


class ZoneRunner:
    def __init__(self, zone: Zone, reorder_window_s: float, max_gap_s: float):
        self.zone = zone
        self.spec = Spec(zone.profile, zone.positions)
        self.window = reorder_window_s
        self.max_gap = max_gap_s
        self.state: State | None = None
        self.air: dict[str, list[float]] = {}  # sensor -> [ts, value], latest fed
        self.fed_ts = -math.inf
        self.last_air_fed_ts: float | None = None
        self.max_ts = -math.inf
        self.pending: list[tuple] = []
        self.heard_wall_ts = -math.inf  # service time of the newest reading taken (to tell a quiet zone)
        self.new_gaps: list[tuple[float, float]] = []
        self.readings_total = 0
        self.last_ts: float | None = None
        self.last_air_c: float | None = None
        self.last_product_c: float | None = None
        self.sensor_names: set[str] = set()  # every sensor name the zone has taken (capped by the engine)
        self._last_air_seen = -math.inf
        self._last_probe_seen = -math.inf
        self.keep_after_ts = -math.inf  # model steps at or before this are not kept for the rules
        self._steps: list[dict] = []  # what each model call produced, until the monitor takes it

    # --- intake --------------------------------------------------------------------------
    def is_late(self, r: Reading) -> bool:
        return r.signal in MODEL_SIGNALS and r.ts <= self.fed_ts

    def accept(self, r: Reading) -> None:
        """Take a stored, non-duplicate reading."""
        self.readings_total += 1
        self.last_ts = r.ts if self.last_ts is None else max(self.last_ts, r.ts)
        if r.signal == "air_c" and r.ts >= self._last_air_seen:
            self._last_air_seen, self.last_air_c = r.ts, r.value
        elif r.signal == "product_c" and r.ts >= self._last_probe_seen:
            self._last_probe_seen, self.last_product_c = r.ts, r.value
        if r.signal in MODEL_SIGNALS and r.ts > self.fed_ts:
            self.pending.append((r.ts, r.sensor, r.signal, r.value))
            self.max_ts = max(self.max_ts, r.ts)

    # --- feeding -------------------------------------------------------------------------
    def advance(self, release_all: bool = False) -> None:
        """Feed every buffered reading that the reorder window has released (release_all: every
        buffered reading, when the zone has gone quiet and nothing is left to wait for)."""
        watermark = self.max_ts if release_all else self.max_ts - self.window
        ready = [p for p in self.pending if p[0] <= watermark]
        if not ready:
            return
        self.pending = [p for p in self.pending if p[0] > watermark]
        ready.sort()
        groups: dict[float, list[tuple]] = defaultdict(list)
        for p in ready:
            groups[p[0]].append(p)
        ts_out, air_out, probe_out = [], [], []
        for ts in sorted(groups):
            probes = []
            has_air = False
            for _, sensor, signal, value in groups[ts]:
                if signal == "air_c":
                    self.air[sensor] = [ts, value]
                    has_air = True
                else:
                    probes.append(value)
            if has_air:
                if self.last_air_fed_ts is not None and ts - self.last_air_fed_ts > self.max_gap:
                    self.new_gaps.append((self.last_air_fed_ts, ts))
                self.last_air_fed_ts = ts
            air = self._air_at(ts)
            if air is None:  # no air reading yet: nothing to start the zone from
                continue
            probe = float(np.mean(probes)) if probes else math.nan
            if self.state is None:
                self.state = new_state(self.spec, ts, air, self.zone.setpoint_c, None if math.isnan(probe) else probe)
                self.fed_ts = ts
                continue
            ts_out.append(ts)
            air_out.append(air)
            probe_out.append(probe)
        if ts_out:
            self.state, trace = advance(
                self.spec, self.state, np.array(ts_out), np.array([air_out]), np.array([probe_out]), trace=True
            )
            self._keep(trace)
        self.fed_ts = max(self.fed_ts, ready[-1][0])

    def _keep(self, trace) -> None:
        """Keep what the rules on model figures judge (engine/timeline.py)."""
        if self.keep_after_ts == math.inf:
            return
        figures = trace_figures(self.spec, trace)
        new_s = trace.sample_ts > self.keep_after_ts
        new_m = trace.time_ts > self.keep_after_ts
        self._steps.append(
            {
                "sample_ts": trace.sample_ts[new_s],
                "product_c": figures["product_c"][new_s],
                "macro_ts": trace.time_ts[new_m],
                "budget_used_pct": figures["budget_used_pct"][new_m],
                "days_to_limit": figures["days_to_limit"][new_m],
            }
        )

    def take_steps(self) -> list[dict]:
        """What the model produced since the last call (for the rules), handed over once."""
        steps, self._steps = self._steps, []
        return steps

    def _air_at(self, ts: float) -> float | None:
        if not self.air:
            return None
        fresh = [v for t, v in self.air.values() if ts - t <= self.max_gap]
        values = fresh or [v for _, v in self.air.values()]
        return float(np.mean(values))

    # --- figures and checkpoints -----------------------------------------------------------
    def figures(self) -> dict:
        """The zone's figures for status and metrics (worst position first)."""
        if self.state is None:
            return {"state": "waiting", "positions": {}}
        rows = position_rows(self.spec, outputs(self.spec, self.state))
        worst = worst_position(rows)
        w = rows[worst]
        return {
            "state": w["state"],
            "worst_position": worst,
            "positions": rows,
            "model_time_ts": self.state.time_ts,
            "mean_diameter_um": w["mean_diameter_um"],
            "budget_used_pct": w["budget_used_pct"],
            "days_to_limit": w["days_to_limit"],
            **{k: w[k] for k in RANGE_KEYS},
            "excess_growth_um": w["excess_growth_um"],
            "product_c": max((r["product_c"] for r in rows.values() if r["product_c"] is not None), default=None),
        }

    def sensors_blob(self) -> dict:
        return {"air": self.air, "last_air_fed_ts": self.last_air_fed_ts}

    def restore(self, fed_ts: float | None, state_arrays: dict | None, sensors: dict) -> None:
        self.fed_ts = -math.inf if fed_ts is None else fed_ts
        self.state = None if state_arrays is None else State.from_arrays(state_arrays)
        self.air = {k: list(v) for k, v in sensors.get("air", {}).items()}
        self.last_air_fed_ts = sensors.get("last_air_fed_ts")
