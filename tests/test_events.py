"""Event detection on synthetic series with known defrosts, doors and a fault.

The series are invented for the test (no published defrost dataset is used); the rates found
are recorded and printed at the end of the test run, and quoted in docs/events.md.
"""

import numpy as np
import pytest

from tests.conftest import record_rate
from watcher.events.detect import DefrostShape, excursions, infer_defrosts, state_intervals

DAY = 86400.0


def synthetic(days=7, step=60.0, noise=0.3, defrosts_per_day=4, door_rate_per_h=3.0, with_fault=True, seed=1):
    """Air at -25 C with regular defrosts (30 min, +6 K), door spikes in working hours, one fault."""
    rng = np.random.default_rng(seed)
    t = np.arange(0.0, days * DAY, step)
    air = -25.0 + rng.normal(0.0, noise, t.size)
    period = DAY / defrosts_per_day
    truth = []
    for k in range(int(days * defrosts_per_day)):
        s = k * period + 1800.0
        truth.append((s, s + 1800.0))
        up = (t >= s) & (t < s + 900)
        down = (t >= s + 900) & (t < s + 1800)
        air[up] += 6.0 * (t[up] - s) / 900
        air[down] += 6.0 * (1 - (t[down] - s - 900) / 900)
    doors = []
    hour = (t / 3600.0) % 24
    level = 0.0
    open_until = -1.0
    door_state = np.zeros(t.size)
    for i in range(t.size):
        in_defrost = any(a - 600 <= t[i] <= b + 600 for a, b in truth)
        if 6 <= hour[i] < 18 and t[i] > open_until and not in_defrost and rng.random() < door_rate_per_h * step / 3600:
            length = rng.uniform(60, 300)
            open_until = t[i] + length
            doors.append((t[i], open_until))
            level += rng.uniform(3.0, 8.0)
        level *= np.exp(-step / 300.0)
        door_state[i] = 1.0 if t[i] < open_until else 0.0
        air[i] += level
    fault = None
    if with_fault:
        f0 = 4.6 * DAY
        fault = (f0, f0 + 4 * 3600)
        on = (t >= f0) & (t < f0 + 4 * 3600)
        air[on] += np.minimum((t[on] - f0) / 3600 * 3.0, 9.0)
    return t, air, door_state, truth, doors, fault


def score(found, truth, days):
    hits = sum(any(f.start_ts <= b and f.end_ts >= a for f in found) for a, b in truth)
    false = sum(not any(f.start_ts <= b and f.end_ts >= a for a, b in truth) for f in found)
    return hits / len(truth), false / days


def test_door_openings_come_from_contact_signals():
    """Each open->closed pair is one opening; a door still open at the end is open-ended."""
    ev = state_intervals(np.array([0, 60, 120, 180, 240, 300]), np.array([0, 1, 1, 0, 1, 1]), "door")
    assert [(e.start_ts, e.end_ts) for e in ev] == [(60.0, 180.0), (240.0, None)]
    assert ev[0].duration_s == 120.0


@pytest.mark.parametrize(
    ("label", "noise", "use_door_signal", "max_false_per_day"),
    [
        ("clean, door contacts", 0.1, True, 0.1),
        ("noisy, door contacts", 0.5, True, 0.1),
        ("noisy, no door contacts", 0.5, False, 0.5),
    ],
)
def test_inferred_defrosts_rates(label, noise, use_door_signal, max_false_per_day):
    """Over 10 synthetic weeks: regular defrosts found (>= 95 %), doors mixed in, the fault
    never explained away as a defrost; false alarms stay low (door contacts let door spikes
    be excluded)."""
    days = 7
    results = []
    for seed in range(1, 11):
        t, air, door_state, truth, doors, fault = synthetic(days=days, noise=noise, seed=seed)
        door_events = state_intervals(t, door_state, "door") if use_door_signal else []
        found = infer_defrosts(t, air, door_events)
        results.append(score(found, truth, days))
        # The fault is never explained away as a defrost: it is still reported as an excursion.
        faults = excursions(t, air, -25.0, door_events + found)
        assert any(e.start_ts <= fault[1] and (e.end_ts is None or e.end_ts >= fault[0]) for e in faults)
    detection, false_per_day = np.mean(results, axis=0)
    record_rate(f"defrost inference, 10 weeks, {label}", detection, false_per_day)
    assert detection >= 0.95
    assert false_per_day <= max_false_per_day


def test_a_single_warm_spell_is_not_a_defrost():
    """Without regular repetition nothing is called a defrost."""
    t = np.arange(0.0, 2 * DAY, 60.0)
    air = np.full(t.size, -25.0)
    air[(t > 40000) & (t < 41800)] += 6.0
    assert infer_defrosts(t, air) == []


def test_excursion_is_the_unexplained_warm_period():
    """The fault is reported as an excursion; defrosts and doors are not."""
    t, air, door_state, truth, doors, fault = synthetic(days=7, noise=0.3)
    door_events = state_intervals(t, door_state, "door")
    defrosts = infer_defrosts(t, air, door_events)
    found = excursions(t, air, -25.0, door_events + defrosts)
    assert len(found) == 1
    # The fault warms the air by 3 K an hour, so it crosses setpoint + 3 K about an hour in.
    assert fault[0] + 1800 <= found[0].start_ts <= fault[0] + 5400
    assert found[0].end_ts >= fault[1] - 600
    assert found[0].peak_c > -18.0


def test_signal_defrosts_need_no_inference():
    """Defrost-state signals become defrost events directly."""
    ev = state_intervals(np.array([0.0, 600.0, 2400.0, 3000.0]), np.array([0, 1, 0, 0]), "defrost")
    assert [(e.kind, e.start_ts, e.end_ts) for e in ev] == [("defrost", 600.0, 2400.0)]


def test_shape_bounds_are_respected():
    """Episodes longer than max_s are not defrosts, however regular."""
    t, air, *_ = synthetic(days=3, noise=0.1, door_rate_per_h=0.0, with_fault=False)
    assert infer_defrosts(t, air, shape=DefrostShape(max_s=10 * 60.0)) == []


def test_regularity_with_intervals_on_the_last_histogram_edge():
    """Starts exactly max_period_s apart fall in numpy's closed last bin; they must still give a
    period (a regression: the bin's members were filtered with an open bound, leaving none)."""
    from watcher.events.detect import DefrostShape, Event, _regular

    shape = DefrostShape()
    day = shape.max_period_s
    found = _regular([Event("defrost", k * day, k * day + 1800.0, source="inferred") for k in range(4)], shape)
    assert len(found) == 4


def _baseline_by_definition(time_ts, air_c, window_s, every_s=600.0):
    """The defrost baseline written out plainly: refresh at the first sample of each every_s
    cell of clock time; the 25 % quantile of the window_s before each refresh, held until the
    next."""
    refresh = [i for i in range(time_ts.size) if i == 0 or time_ts[i] // every_s != time_ts[i - 1] // every_s]
    out = np.empty(time_ts.size)
    for k, r in enumerate(refresh):
        lo = int(np.searchsorted(time_ts, time_ts[r] - window_s, side="left"))
        end = refresh[k + 1] if k + 1 < len(refresh) else time_ts.size
        out[r:end] = np.percentile(air_c[lo : r + 1], 25)
    return out


@pytest.mark.parametrize("step_s", [60.0, 17.3, 599.99, 1.0])
def test_the_vectorised_baseline_equals_its_plain_definition(step_s):
    """The baseline's vectorised form (refresh points found by search, short windows' quantile
    computed as np.percentile's linear method) gives exactly the plain definition's values, on
    regular, irregular, rounded and repeated sample times (derived: the same definition)."""
    from watcher.events.detect import _baseline

    rng = np.random.default_rng(int(step_s * 100))
    for trial in range(12):
        n = int(rng.integers(2, 2500))
        t = 1.7e9 + (np.cumsum(rng.exponential(step_s, n)) if trial % 2 else step_s * np.arange(n))
        if trial % 3 == 0:
            t = np.round(t, 1)
        if trial % 4 == 0:
            t = np.sort(np.concatenate([t, t[: n // 3]]))
        air = rng.normal(-25.0, 1.0, t.size).round(int(rng.integers(0, 3)))
        assert np.array_equal(_baseline(t, air, 6 * 3600.0), _baseline_by_definition(t, air, 6 * 3600.0)), trial


def test_the_baseline_memo_saves_work_and_never_changes_the_answer():
    """The live analysis calls the baseline every 15 minutes over the last days of air. With the
    zone's memo it gives exactly the values computed afresh, pass after pass, through a growing
    last minute, a value changed in the past (a late reading), a gap filled, a sample gone and
    the span's start moving; on an ordinary pass it takes nearly every window from the memo."""
    from watcher.events.detect import BaselineMemo, _baseline

    rng = np.random.default_rng(5)
    minutes = np.arange(6 * 1440)
    t_all = 1.7e9 + 60.0 * minutes
    air_all = -25.0 + rng.normal(0, 0.3, minutes.size) + np.where(minutes % 360 < 20, 6.0, 0.0)
    memo = BaselineMemo()
    edits = {10: "late", 14: "fill", 18: "drop"}
    reused = []
    for k in range(24):
        hi = 4 * 1440 + 15 * k
        t, air = t_all[15 * k : hi].copy(), air_all[15 * k : hi].copy()
        air[-1] += 0.1 * k  # the newest bin is still filling
        if edits.get(k) == "late":
            air_all[hi - 600] += 0.7
            air = air_all[15 * k : hi].copy()
        if edits.get(k) == "fill":
            t, air = np.insert(t, 3000, t[3000] - 30.0), np.insert(air, 3000, -20.0)
        if edits.get(k) == "drop":
            t, air = np.delete(t, 2000), np.delete(air, 2000)
        got = _baseline(t, air, 6 * 3600.0, memo=memo)
        assert np.array_equal(got, _baseline(t, air, 6 * 3600.0)), k
        reused.append(memo.reused)
    refresh = 4 * 144
    assert reused[0] == 0
    ordinary = [r for k, r in enumerate(reused) if k and k not in edits and k - 1 not in edits]
    assert min(ordinary) >= refresh - 40, ordinary  # all but the first six hours' short windows
    assert reused[14] < refresh / 2  # the filled gap changed every later window
