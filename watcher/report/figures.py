"""The summary's figures, computed with pandas from a SiteWeek. Times in the site's zone."""

from __future__ import annotations

import numpy as np
import pandas as pd

from watcher.engine.batch import reason_class
from watcher.report.data import ZoneModel

BENCHMARKS_C = (
    (-18.0, "-18 C (quick-frozen benchmark; not a legal limit for ice cream)"),
    (-15.0, "-15 C (-18 C plus the 3 K allowed for brief rises in transport, a benchmark)"),
)


def _local(ts, tz: str) -> pd.Series:
    return pd.to_datetime(pd.Series(ts, dtype="float64"), unit="s", utc=True).dt.tz_convert(tz)


def _hours_above(time_ts: np.ndarray, v: np.ndarray, level: float, end_ts: float) -> float:
    """Hours a held series spends above level (each sample holds until the next, the last to end_ts)."""
    if time_ts.size == 0:
        return 0.0
    dt = np.diff(np.concatenate((time_ts, [end_ts])))
    return float(dt[v > level].sum() / 3600.0)


def temperature_table(m: ZoneModel, setpoint_c: float, end_ts: float) -> pd.DataFrame:
    rows = []
    for name, values in (("air", m.air_c), ("product (estimated, warmest position)", m.product_c)):
        s = pd.Series(values, dtype="float64").dropna()
        row = {"series": name, "samples": int(s.size)}
        if s.size:
            q = s.quantile([0.05, 0.5, 0.95])
            row.update(min_c=s.min(), mean_c=s.mean(), p5_c=q[0.05], median_c=q[0.5], p95_c=q[0.95], max_c=s.max())
        levels = [(lv, label) for lv, label in BENCHMARKS_C] + [
            (setpoint_c + 3.0, f"setpoint +3 K ({setpoint_c + 3:g} C)")
        ]
        for level, label in levels:
            row[f"hours above {label}"] = _hours_above(m.time_ts, np.asarray(values), level, end_ts)
        rows.append(row)
    return pd.DataFrame(rows)


def door_figures(ev: pd.DataFrame, tz: str, week_end: float) -> tuple[dict, pd.DataFrame]:
    doors = ev[ev["kind"] == "door"].copy()
    doors["open_s"] = doors["end_ts"].fillna(week_end) - doors["start_ts"]
    by_hour = (
        _local(doors["start_ts"], tz).dt.hour.value_counts().reindex(range(24), fill_value=0).rename("openings")
        if len(doors)
        else pd.Series(0, index=range(24), name="openings")
    )
    summary = {
        "count": int(len(doors)),
        "total_open_min": float(doors["open_s"].sum() / 60.0),
        "longest_min": float(doors["open_s"].max() / 60.0) if len(doors) else 0.0,
    }
    return summary, by_hour.rename_axis("hour").reset_index()


def defrost_figures(ev: pd.DataFrame, peak_air, week_end: float) -> dict:
    """peak_air(start_ts, end_ts): the zone's highest air reading in that span (or None)."""
    d = ev[ev["kind"] == "defrost"].copy()
    if d.empty:
        return {"count": 0, "mean_min": None, "longest_min": None, "peak_air_c": None, "inferred": 0}
    d["dur_s"] = d["end_ts"].fillna(week_end) - d["start_ts"]
    peaks = [peak_air(r.start_ts, r.end_ts if pd.notna(r.end_ts) else week_end) for r in d.itertuples()]
    peaks = [np.nan if p is None else p for p in peaks]
    return {
        "count": int(len(d)),
        "mean_min": float(d["dur_s"].mean() / 60.0),
        "longest_min": float(d["dur_s"].max() / 60.0),
        "peak_air_c": float(np.nanmax(peaks)) if peaks and not all(pd.isna(peaks)) else None,
        "inferred": int((d["source"] == "inferred").sum()),
    }


def event_list(ev: pd.DataFrame, kind: str, tz: str) -> pd.DataFrame:
    x = ev[ev["kind"] == kind]
    return pd.DataFrame(
        {
            "event": x["id"].values,  # the id `watcher what-if --without-event` takes
            "start": _local(x["start_ts"], tz).dt.strftime("%a %d %b %H:%M").values,
            "end": [
                "still on" if pd.isna(e) else v
                for e, v in zip(x["end_ts"], _local(x["end_ts"].fillna(0), tz).dt.strftime("%a %H:%M"))
            ],
            "minutes": ((x["end_ts"] - x["start_ts"]) / 60.0).round(0).values,
            "peak_air_c": x["peak_c"].values,
            "excess_um": x["excess_um"].values,
            "budget_share_pct": x["budget_share_pct"].values,
            "cost": x["cost"].values,
        }
    )


def growth_table(daily: pd.DataFrame, zone: str) -> pd.DataFrame:
    d = daily[daily["zone"] == zone]
    cols = ["baseline_um", "defrost_um", "door_um", "excursion_um", "unattributed_um", "total_excess_um"]
    out = d[["day", *cols]].copy()
    if len(out):
        total = out[cols].sum().to_dict()
        out = pd.concat([out, pd.DataFrame([{"day": "week", **total}])], ignore_index=True)
    return out


def alert_table(alerts: pd.DataFrame, alert_log: pd.DataFrame, tz: str, upto_ts: float) -> pd.DataFrame:
    """One row per alert active in the week. minutes_to_ack is clock time to clock time: from
    when the service raised it (its log's `raise` step, service time) to the acknowledgement;
    `raised` is the data time the rule fired at. open_at_week_end: still open at upto_ts."""
    if alerts.empty:
        columns = ["id", "zone", "severity", "what", "raised", "acknowledged", "minutes_to_ack", "cleared", "status"]
        return pd.DataFrame(columns=[*columns, "open_at_week_end"])
    raises = alert_log[alert_log["step"] == "raise"].groupby("alert_id")["wall_ts"].min() if len(alert_log) else None
    raised_wall = alerts["id"].map(raises) if raises is not None else pd.Series(np.nan, index=alerts.index)
    to_ack = (alerts["acked_ts"] - raised_wall.fillna(alerts["raised_ts"])) / 60.0
    return pd.DataFrame(
        {
            "id": alerts["id"].values,
            "zone": alerts["zone"].values,
            "severity": alerts["severity"].values,
            "what": alerts["label"].values,
            "raised": _local(alerts["raised_ts"], tz).dt.strftime("%a %d %b %H:%M").values,
            "acknowledged": [
                "" if pd.isna(by) else f"{by}, {t}"
                for by, t in zip(alerts["acked_by"], _local(alerts["acked_ts"].fillna(0), tz).dt.strftime("%a %H:%M"))
            ],
            "minutes_to_ack": to_ack.round(1).values,
            "cleared": [
                "" if pd.isna(c) else v
                for c, v in zip(
                    alerts["cleared_ts"], _local(alerts["cleared_ts"].fillna(0), tz).dt.strftime("%a %d %b %H:%M")
                )
            ],
            "status": alerts["status"].values,
            "open_at_week_end": (alerts["cleared_ts"].isna() | (alerts["cleared_ts"] >= upto_ts)).values,
        }
    )


def completeness(sensors, week_s: float) -> pd.DataFrame:
    """Per sensor and signal: readings received against those expected at the sensor's own
    median interval over the whole week. sensors: (zone, sensor, signal, times in order, late
    count) one sensor at a time (store.reports.sensor_weeks)."""
    rows = []
    for zone, sensor, signal, times, late in sensors:
        ts = np.asarray(times, dtype=float)
        periodic = signal in ("air_c", "product_c")  # doors and defrosts report on change only
        step = float(np.median(np.diff(ts))) if periodic and ts.size > 1 else None
        expected = int(round(week_s / step)) if step else None
        rows.append(
            {
                "zone": zone,
                "sensor": sensor,
                "signal": signal,
                "received": int(ts.size),
                "median_interval_s": step,
                "expected": expected,
                "complete_pct": min(100.0, 100.0 * ts.size / expected) if expected else None,
                "late": int(late),
            }
        )
    return pd.DataFrame(rows)


def rejection_table(rej: pd.DataFrame) -> pd.DataFrame:
    if rej.empty:
        return pd.DataFrame(columns=["reason", "messages"])
    counts = rej.assign(reason=rej["reason"].map(reason_class)).groupby("reason")["n"].sum()  # a row stands for n
    return counts.sort_values(ascending=False).rename_axis("reason").reset_index(name="messages")
