"""The built-in demo site: invented data for a fictional cold store, for the demo only.

"Kestrel Point Frozen Distribution, Unit 4" has three zones with different regimes: a
hardening room with one short defrost a day (no defrost signal: watcher infers them), a bulk
store with four signalled defrosts a day, and a busy dispatch freezer with door contacts,
three signalled defrosts a day and one refrigeration fault. The series are synthetic (seeded, reproducible) and model nothing
measured.
"""

from __future__ import annotations

import json
from dataclasses import dataclass

import numpy as np

SITE_ID = "kestrel"
SITE_NAME = "Kestrel Point Frozen Distribution, Unit 4"
TIMEZONE = "Europe/London"


@dataclass(frozen=True)
class DemoZone:
    zone_id: str
    name: str
    setpoint_c: float
    regime: str
    time_ts: np.ndarray
    air_c: np.ndarray
    doors: list[tuple[float, float]]  # door-contact intervals (open, closed)
    defrosts: list[tuple[float, float]]  # defrost-signal intervals (on, off); empty: no signal


def _defrosts(time_ts, start_ts, per_day: int, minutes: float, rise_k: float, offset_h: float = 0.0):
    """Air rise during defrost (a ramp up over the defrost, recovery over as long again) and
    the defrost intervals."""
    period = 86400.0 / per_day
    phase = (time_ts - start_ts - offset_h * 3600.0) % period
    dur = minutes * 60.0
    up = np.clip(phase / dur, 0.0, 1.0) * (phase < dur)
    down = np.clip(1.0 - (phase - dur) / dur, 0.0, 1.0) * ((phase >= dur) & (phase < 2 * dur))
    starts = time_ts[(phase < time_ts[1] - time_ts[0])] if time_ts.size > 1 else time_ts[:0]
    intervals = [(float(s), float(s + dur)) for s in starts if s + dur <= time_ts[-1]]  # none ends in the future
    return rise_k * (up + down), intervals


def build(
    start_ts: float, days: float, step_s: float = 60.0, seed: int = 7, fault_day: float | None = None
) -> list[DemoZone]:
    """The three zones' series from start_ts for `days`; the refrigeration fault starts
    fault_day days after start_ts (default: two and a quarter days before the end)."""
    rng = np.random.default_rng(seed)
    t = start_ts + np.arange(0.0, days * 86400.0, step_s)
    hour = ((t - start_ts) / 3600.0) % 24.0
    day = (t - start_ts) / 86400.0

    def noisy(x):
        return np.round(x + rng.normal(0.0, 0.15, x.size), 2)

    h_rise, _ = _defrosts(t, start_ts, 1, 20, 3.0, offset_h=2.0)
    b_rise, b_defrosts = _defrosts(t, start_ts, 4, 30, 6.0)
    d_rise, d_defrosts = _defrosts(t, start_ts, 3, 25, 5.0, offset_h=1.0)
    # Door openings in the working day (06-18 h, six days a week), about three an hour: open
    # 1-4 minutes; the air jumps and decays in about 5 minutes.
    working = (hour >= 6) & (hour < 18) & (((t - start_ts) // 86400) % 7 < 6)
    opens = np.flatnonzero(working & (rng.random(t.size) < step_s / 1200.0))
    doors, jump = [], np.zeros(t.size)
    for i in opens:
        open_s = float(rng.uniform(60.0, 240.0))
        if t[i] + open_s <= t[-1]:
            doors.append((float(t[i]), float(t[i] + open_s)))
            jump[i] = rng.uniform(2.0, 5.0)
    door_air = np.zeros(t.size)
    level = 0.0
    for i in range(t.size):
        level = level * np.exp(-step_s / 300.0) + jump[i]
        door_air[i] = level
    # One refrigeration fault: a compressor trip, 6 h of warming, then recovery.
    f0 = days - 2.25 if fault_day is None else fault_day
    fault = np.where((day >= f0) & (day < f0 + 0.25), (day - f0) / 0.25 * 12.0, 0.0)
    fault = fault + np.where((day >= f0 + 0.25) & (day < f0 + 0.35), 12.0 * (1.0 - (day - f0 - 0.25) / 0.1), 0.0)
    return [
        DemoZone(
            "hardening", "Hardening room", -30.0, "one short defrost a day (inferred)", t, noisy(-30.0 + h_rise), [], []
        ),
        DemoZone(
            "bulk-a", "Bulk store A", -25.0, "four signalled defrosts a day", t, noisy(-25.0 + b_rise), [], b_defrosts
        ),
        DemoZone(
            "dispatch",
            "Dispatch freezer",
            -24.0,
            "busy doors, three signalled defrosts a day, one refrigeration fault",
            t,
            noisy(-24.0 + d_rise + np.minimum(door_air, 8.0) + fault),
            doors,
            d_defrosts,
        ),
    ]


def messages(zones: list[DemoZone]) -> list[tuple[float, str, bytes]]:
    """(ts, topic, payload) of every sensor message, in time order."""
    out = []
    for z in zones:
        out += [
            (float(ts), f"kestrel/{z.zone_id}/air-1/air", json.dumps({"temp": float(v), "ts": float(ts)}).encode())
            for ts, v in zip(z.time_ts, z.air_c)
        ]
        for a, b in z.doors:
            out.append((a, f"kestrel/{z.zone_id}/dock/door", json.dumps({"state": "open", "ts": a}).encode()))
            out.append((b, f"kestrel/{z.zone_id}/dock/door", json.dumps({"state": "closed", "ts": b}).encode()))
        for a, b in z.defrosts:
            out.append((a, f"kestrel/{z.zone_id}/evaporator/defrost", json.dumps({"state": "on", "ts": a}).encode()))
            out.append((b, f"kestrel/{z.zone_id}/evaporator/defrost", json.dumps({"state": "off", "ts": b}).encode()))
    out += lot_messages(zones[0].time_ts[0], zones[0].time_ts[-1])
    out.sort(key=lambda m: m[0])
    return out


def lot_messages(start_ts: float, end_ts: float) -> list[tuple[float, str, bytes]]:
    """Invented lots of the demo site, as a warehouse system would publish them: put away in
    the bulk store from hardening, one bought in half-used, one moved to dispatch, one shipped."""
    day = 86400.0
    events = [
        (start_ts + 0.1 * day, {"event": "arrive", "lot": "KP-0417", "zone": "bulk-a"}),
        (
            start_ts + 0.2 * day,
            {"event": "arrive", "lot": "KP-0418", "zone": "bulk-a", "initial": {"budget_used_pct": 20}},
        ),
        (
            start_ts + 0.3 * day,
            {
                "event": "arrive",
                "lot": "EXT-77",
                "zone": "bulk-a",
                "initial": {"budget_used_pct": 45},
                "note": "bought in",
            },
        ),  # fmt: skip
        (start_ts + 1.0 * day, {"event": "arrive", "lot": "KP-0421", "zone": "hardening"}),
        (start_ts + 2.0 * day, {"event": "move", "lot": "KP-0421", "zone": "bulk-a"}),
        (end_ts - 4.0 * day, {"event": "move", "lot": "KP-0418", "zone": "dispatch"}),
        (end_ts - 1.0 * day, {"event": "depart", "lot": "KP-0418"}),
    ]
    return [(ts, "watcher/lots", json.dumps({**doc, "time": ts}).encode()) for ts, doc in events]


def config_text(folder: str, port: int | None) -> str:
    """The demo site's service configuration (no secrets: a private broker on loopback)."""
    zones = "".join(
        f'\n[[zones]]\nid = "{zid}"\nname = "{name}"\nsetpoint_c = {sp}\n'
        for zid, name, sp in (
            ("hardening", "Hardening room", -30.0),
            ("bulk-a", "Bulk store A", -25.0),
            ("dispatch", "Dispatch freezer", -24.0),
        )
    )
    return f"""# The demo site's configuration, written by `watcher demo` (invented site and data).
[broker]
host = "127.0.0.1"
port = {port or 1883}
client_id = "watcher-demo"

[storage]
path = "{folder}/watcher.db"

[ingest]
reorder_window_s = 120.0
past_limit_days = 60.0
batch_max = 100                    # small batches: rules are judged at each commit (about 30 min of demo data)

[health]
port = 0

[reports]
dir = "{folder}/reports"

[events]
analyse_every_min = 60.0           # events and costs brought up to date every hour of demo data

[alerts]
repeat_min = 240
disable = ["rejections"]

[[sites]]
id = "{SITE_ID}"
name = "{SITE_NAME}"
timezone = "{TIMEZONE}"
{zones}
[[sources]]
pattern = "kestrel/{{zone}}/{{sensor}}/air"
signal = "air_c"
value = "temp"
time = "ts"
time_format = "epoch_s"

[[sources]]
pattern = "kestrel/{{zone}}/{{sensor}}/door"
signal = "door"
value = "state"
time = "ts"
time_format = "epoch_s"

[[sources]]
pattern = "kestrel/{{zone}}/{{sensor}}/defrost"
signal = "defrost"
value = "state"
time = "ts"
time_format = "epoch_s"
"""
