"""Find door openings, defrost cycles and excursions in a zone's readings. Pure: numpy only.

- Door openings come from contact signals: each open (1) to closed (0) pair is one opening.
- Defrosts come from defrost-state signals where a site has them. Where it does not, they are
  inferred from the air temperature: a defrost is a bounded rise and recovery that repeats at a
  regular interval. The detector finds warm episodes (air more than `rise_k` above a running
  baseline), keeps those whose duration and peak lie within the configured bounds and that
  overlap no door opening, and then keeps only episodes locked to the dominant repeat interval
  of all episodes (a one-off warm spell, or a door spike at a random time, is not a defrost).
- Excursions are the remaining warm episodes: air more than `excursion_k` above the setpoint
  for at least `excursion_min_s`, explained by neither a door opening nor a defrost (a
  refrigeration fault, a loading operation).

Limits: the detector needs a few cycles before it can see regularity, misses defrosts that
coincide with door openings, and cannot tell a defrost from a fault that happens to recur at
the defrost interval. Its rates on synthetic series are measured in tests/test_events.py and
quoted in docs/events.md.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from watcher.declare import setting

RECOVERY_TOLERANCE_K = 0.3  # sensor noise allowed while the air pulls down after a defrost


@dataclass(frozen=True)
class Event:
    kind: str  # "door", "defrost" or "excursion"
    start_ts: float
    end_ts: float | None  # None: still going on at the end of the data
    peak_c: float | None = None
    source: str = "signal"  # "signal" or "inferred"

    @property
    def duration_s(self) -> float | None:
        return None if self.end_ts is None else self.end_ts - self.start_ts


@dataclass(frozen=True)
class DefrostShape:
    """What an inferred defrost looks like (defaults: 15-45 min, a rise of a few K [from memory, low confidence])."""

    rise_k: float = setting(
        1.5, "air this far above its running cold level starts a warm episode", key="defrost_rise_k", lo=0.1, hi=30.0
    )
    min_s: float = setting(
        10 * 60.0,
        "an inferred defrost lasts at least ... (minutes)",
        key="defrost_min_min",
        scale=60.0,
        lo=1.0,
        hi=600.0,
    )
    max_s: float = setting(
        90 * 60.0, "... and at most this long (minutes)", key="defrost_max_min", scale=60.0, lo=1.0, hi=600.0
    )
    min_peak_k: float = 2.0
    max_peak_k: float = 15.0
    baseline_window_s: float = 6 * 3600.0
    min_peak_position: float = 0.25  # peak at least a quarter of the way through the episode
    period_tolerance: float = 0.03  # timer-driven: starts repeat within 3 % of the period (at least 10 min)
    min_period_s: float = 3 * 3600.0
    max_period_s: float = 24 * 3600.0


def state_intervals(time_ts: np.ndarray, state: np.ndarray, kind: str) -> list[Event]:
    """Open/closed (or on/off) readings to intervals; repeated states are ignored."""
    events: list[Event] = []
    start = None
    for t, s in zip(np.asarray(time_ts, float), np.asarray(state, float)):
        if s >= 0.5 and start is None:
            start = float(t)
        elif s < 0.5 and start is not None:
            events.append(Event(kind, start, float(t)))
            start = None
    if start is not None:
        events.append(Event(kind, start, None))
    return events


def _refresh_points(time_ts: np.ndarray, every_s: float) -> np.ndarray:
    """The samples where the baseline is recomputed: the first sample of each every_s cell of
    absolute time (cells are fixed on the clock, not on the first sample, so the same readings
    give the same baseline however the span handed to the detector is cut)."""
    cell = np.floor_divide(np.asarray(time_ts, float), every_s)
    return np.flatnonzero(np.concatenate(([True], cell[1:] != cell[:-1])))


def _low_quantile(rows: np.ndarray, lengths: np.ndarray) -> np.ndarray:
    """The 25 % quantile of each row's first `length` values, as np.percentile's linear method
    computes it (rows padded past their length; tests/test_events.py checks the baseline built
    on it against the plain definition)."""
    s = np.sort(rows, axis=1)
    vi = (lengths - 1) * 0.25
    lo = np.floor(vi).astype(int)
    hi = np.minimum(lo + 1, lengths - 1)
    gamma = vi - lo
    a, b = s[np.arange(len(s)), lo], s[np.arange(len(s)), hi]
    diff = b - a
    return np.where(gamma >= 0.5, b - diff * (1 - gamma), a + diff * gamma)


@dataclass
class BaselineMemo:
    """One zone's previous baseline call: its samples and the values of its complete windows.
    The next call takes a window's value from here only when that window's samples are the
    same, time for time and value for value (checked, not assumed), so the result never
    depends on the memo; only the work does. The live analysis re-reads days of air every
    pass, of which a few minutes are new."""

    time_ts: np.ndarray = field(default_factory=lambda: np.empty(0))
    air_c: np.ndarray = field(default_factory=lambda: np.empty(0))
    refresh_ts: np.ndarray = field(default_factory=lambda: np.empty(0))
    values: np.ndarray = field(default_factory=lambda: np.empty(0))  # NaN: window was cut short
    reused: int = 0  # windows the last call took from here (for tests and benchmarks)


def _unchanged(memo: BaselineMemo, t: np.ndarray, air: np.ndarray) -> np.ndarray:
    """Per sample of t: True where the memo holds the same sample (time and value) and every
    sample between the start of the overlap and this one is the same too (prefix), else False."""
    same = np.zeros(t.size, bool)
    if memo.time_ts.size == 0 or t.size == 0:
        return same
    lo_ts, hi_ts = max(t[0], memo.time_ts[0]), min(t[-1], memo.time_ts[-1])
    c0, c1 = np.searchsorted(t, lo_ts, side="left"), np.searchsorted(t, hi_ts, side="right")
    p0, p1 = np.searchsorted(memo.time_ts, lo_ts, side="left"), np.searchsorted(memo.time_ts, hi_ts, side="right")
    if c1 <= c0 or c1 - c0 != p1 - p0:
        return same
    eq = (t[c0:c1] == memo.time_ts[p0:p1]) & (air[c0:c1] == memo.air_c[p0:p1])
    same[c0:c1] = np.logical_and.accumulate(eq)
    return same


def _from_memo(memo: BaselineMemo, t, air, idx, lo, complete) -> np.ndarray:
    """Values of the refresh points whose complete window the memo holds unchanged; NaN elsewhere."""
    out = np.full(idx.size, np.nan)
    if memo is None or memo.refresh_ts.size == 0:
        return out
    same = _unchanged(memo, t, air)
    # A window is unchanged when its first and last samples lie in the unchanged prefix run
    # (the prefix is contiguous, so every sample between them is unchanged too).
    ok = complete & same[lo] & same[idx]
    at = np.searchsorted(memo.refresh_ts, t[idx])
    at = np.minimum(at, memo.refresh_ts.size - 1)
    ok &= memo.refresh_ts[at] == t[idx]
    out[ok] = memo.values[at[ok]]
    memo.reused = int(np.count_nonzero(~np.isnan(out)))
    return out


def _baseline(
    time_ts: np.ndarray, air_c: np.ndarray, window_s: float, every_s: float = 600.0, memo: BaselineMemo | None = None
) -> np.ndarray:
    """A running low quantile (25 %) of the air over the preceding window: the cold, settled
    level. Recomputed at each refresh point and held in between. The window start is found by
    time; windows whose values the memo holds unchanged are taken from it, the full-length
    windows' quantiles are taken in one vectorised call, the shorter ones in another."""
    n = time_ts.size
    idx = _refresh_points(time_ts, every_s)
    lo = np.searchsorted(time_ts, time_ts[idx] - window_s, side="left")
    complete = time_ts[idx] - window_s >= time_ts[0]  # no sample of the window can lie before the data
    values = _from_memo(memo, time_ts, air_c, idx, lo, complete)
    todo = np.isnan(values)
    lengths = idx - lo + 1
    full = lengths.max()
    sel = todo & (lengths == full)  # regular data: all but the first window_s
    if sel.any():
        windows = np.lib.stride_tricks.sliding_window_view(air_c, int(full))[lo[sel]]
        values[sel] = np.percentile(windows, 25, axis=1)
    short = np.flatnonzero(todo & ~sel)
    if short.size:
        pad = np.full((short.size, int(lengths[short].max())), np.inf)
        for row, k in enumerate(short):
            pad[row, : lengths[k]] = air_c[lo[k] : idx[k] + 1]
        values[short] = _low_quantile(pad, lengths[short])
    if memo is not None:
        memo.time_ts, memo.air_c = time_ts.copy(), air_c.copy()
        memo.refresh_ts, memo.values = time_ts[idx], np.where(complete, values, np.nan)
    return np.repeat(values, np.diff(np.append(idx, n)))


def _episodes(time_ts: np.ndarray, excess: np.ndarray, threshold: float) -> list[tuple[int, int]]:
    """Index ranges [i, j] where excess stays above threshold."""
    above = excess > threshold
    edges = np.flatnonzero(np.diff(above.astype(np.int8)))
    starts = list(edges[~above[edges]] + 1)
    ends = list(edges[above[edges]])
    if above[0]:
        starts.insert(0, 0)
    if above[-1]:
        ends.append(len(above) - 1)
    return list(zip(starts, ends))


def _overlaps(a0: float, a1: float, events: list[Event]) -> bool:
    return any(e.start_ts <= a1 and (e.end_ts is None or e.end_ts >= a0) for e in events)


def infer_defrosts(
    time_ts, air_c, doors: list[Event] = (), shape: DefrostShape = DefrostShape(), memo: BaselineMemo | None = None
) -> list[Event]:
    """Defrost cycles inferred from the air temperature pattern (memo: the zone's previous
    call, which saves work and never changes the answer)."""
    t = np.asarray(time_ts, float)
    air = np.asarray(air_c, float)
    if t.size < 3:
        return []
    base = _baseline(t, air, shape.baseline_window_s, memo=memo)
    candidates = []
    for i, j in _episodes(t, air - base, shape.rise_k):
        start, end = float(t[max(i - 1, 0)]), float(t[min(j + 1, t.size - 1)])
        rise = air[i : j + 1] - base[i : j + 1]
        peak = float(np.max(rise))
        if not (shape.min_s <= end - start <= shape.max_s and shape.min_peak_k <= peak <= shape.max_peak_k):
            continue
        # A door opening jumps and then decays (peak at once); a defrost ramps up and back.
        if (t[i + int(np.argmax(rise))] - start) / (end - start) < shape.min_peak_position:
            continue
        if _overlaps(start, end, list(doors)):
            continue
        candidates.append(Event("defrost", start, end, float(np.max(air[i : j + 1])), "inferred"))
    return _regular(candidates, shape)


def _regular(candidates: list[Event], shape: DefrostShape) -> list[Event]:
    """Keep candidates locked to the dominant repeat interval of all candidates.

    Defrosts run on a timer, so their starts repeat at one period P. P is the most common
    pairwise interval (10-min bins between min_period_s and max_period_s); a candidate is kept
    when another candidate starts P or 2P before or after it, within max(10 min, 3 % of P).
    Door spikes come at random times and rarely line up like that.
    """
    if len(candidates) < 3:
        return []
    starts = np.array([c.start_ts for c in candidates])
    diffs = (starts[None, :] - starts[:, None]).ravel()
    diffs = diffs[(diffs >= shape.min_period_s) & (diffs <= shape.max_period_s)]
    if diffs.size == 0:
        return []
    bins = np.arange(shape.min_period_s, shape.max_period_s + 600.0, 600.0)
    counts, edges = np.histogram(diffs, bins=bins)
    best = int(np.argmax(counts))
    last = best == counts.size - 1  # numpy's last bin includes its right edge
    in_bin = diffs[(diffs >= edges[best]) & ((diffs < edges[best + 1]) | (last & (diffs == edges[best + 1])))]
    period = float(np.median(in_bin))
    tol = max(600.0, shape.period_tolerance * period)
    kept = []
    for c in candidates:
        gaps = np.abs(starts - c.start_ts)
        if np.any((np.abs(gaps - period) <= tol) | (np.abs(gaps - 2 * period) <= tol)):
            kept.append(c)
    return kept


def excursions(
    time_ts,
    air_c,
    setpoint_c: float,
    explained: list[Event],
    excursion_k: float = 3.0,
    min_s: float = 20 * 60.0,
    defrost_recovery_s: float = 45 * 60.0,
) -> list[Event]:
    """Warm periods above setpoint + excursion_k for at least min_s, not explained by doors or
    defrosts: explained when door openings and defrosts cover at least half of the period. A
    defrost also explains the air's pull-down after it ends, for up to defrost_recovery_s while
    the air is falling (no warmer than when the defrost ended). Door openings explain only the
    time the door is open: a fault that keeps warming between door openings must not hide
    behind them, so a burst of openings can show as an excursion (a loading operation)."""
    t = np.asarray(time_ts, float)
    air = np.asarray(air_c, float)
    if t.size < 2:
        return []
    out = []
    for i, j in _episodes(t, air - setpoint_c, excursion_k):
        start = float(t[i])
        end = float(t[j]) if j < t.size - 1 else None
        if (t[j] - t[i]) < min_s:
            continue
        seg, warm = t[i : j + 1], air[i : j + 1]
        mask = np.zeros(seg.size, bool)
        for e in explained:
            e_end = e.end_ts if e.end_ts is not None else float(t[-1])
            mask |= (seg >= e.start_ts) & (seg <= e_end)
            if e.kind == "defrost":
                after = (seg > e_end) & (seg <= e_end + defrost_recovery_s)
                if after.any():
                    mask |= after & (warm <= float(np.interp(e_end, t, air)) + RECOVERY_TOLERANCE_K)
        held = np.diff(np.append(seg, seg[-1]))  # each sample holds until the next
        if held[mask].sum() >= 0.5 * (t[j] - t[i]):
            continue
        out.append(Event("excursion", start, end, float(np.max(warm)), "inferred"))
    return out
