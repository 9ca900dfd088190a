"""Charts as inline SVG text (matplotlib, Agg; glyphs drawn as paths, so no fonts are needed)."""

from __future__ import annotations

import io
import re
from zoneinfo import ZoneInfo

import matplotlib

matplotlib.use("Agg")
import matplotlib.dates as mdates  # noqa: E402
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

matplotlib.rcParams.update(
    {
        "svg.fonttype": "path",
        "svg.hashsalt": "watcher",
        "font.size": 8,
        "axes.spines.top": False,
        "axes.spines.right": False,
        "axes.grid": True,
        "grid.color": "#e3e6e8",
        "grid.linewidth": 0.6,
    }
)
AIR, PRODUCT, SIZE, LIMIT = "#1f6f78", "#8a4f7d", "#3b4a6b", "#b23a3a"
CAUSES = {
    "baseline_um": ("at setpoint", "#9aa5b1"),
    "defrost_um": ("defrosts", "#e0a030"),
    "door_um": ("doors", "#4f8fbf"),
    "excursion_um": ("excursions", "#c4573a"),
}


def _svg(fig, bottom_in: float = 0.3, left_in: float = 0.6) -> str:
    """The figure as SVG text. Margins are set in inches (room for the y labels, the title and
    the x tick labels) rather than found by a "tight" bounding box, which draws every chart
    twice: a week's summary of a big site draws dozens."""
    w, h = fig.get_size_inches()
    fig.subplots_adjust(left=left_in / w, right=1.0 - 0.12 / w, top=1.0 - 0.26 / h, bottom=bottom_in / h)
    buf = io.StringIO()
    fig.savefig(buf, format="svg", metadata={"Date": None})
    plt.close(fig)
    text = buf.getvalue()
    text = re.sub(r"<metadata>.*?</metadata>", "", text, flags=re.S)  # authoring metadata only
    return text[text.index("<svg") :]


def _days(time_ts) -> np.ndarray:
    """Times as matplotlib's date numbers (days since its epoch, 1970-01-01 UTC): plotting plain
    floats skips a conversion of every point through datetime objects. Ticks and their labels
    are placed and written in the site's time zone by the locators and formatters."""
    return np.asarray(time_ts, dtype=float) / 86400.0 - EPOCH_DAYS


EPOCH_DAYS = float(np.datetime64(mdates.get_epoch(), "s").astype(np.int64)) / 86400.0


def zone_chart(
    model, events: pd.DataFrame, setpoint_c: float, tz: str, start_ts: float, end_ts: float, title: str
) -> str:
    """Air and estimated product temperature with defrosts and door openings marked; below,
    the predicted mean crystal diameter against the limit."""
    fig, (top, bottom) = plt.subplots(2, 1, figsize=(7.0, 3.9), sharex=True, height_ratios=(3, 2))
    zone = ZoneInfo(tz)
    x0, x1 = _days([start_ts, end_ts])
    if model is not None and model.time_ts.size:
        step = max(1, model.time_ts.size // 2000)  # keep the SVG small: at most ~2000 points a line
        t = _days(model.time_ts[::step])
        top.plot(t, model.air_c[::step], color=AIR, lw=0.8, label="air")
        top.plot(t, model.product_c[::step], color=PRODUCT, lw=1.1, label="product (est.)")
    top.axhline(setpoint_c, color="#555", lw=0.7, ls="--", label=f"setpoint {setpoint_c:g} C")
    top.axhline(-18.0, color="#999", lw=0.7, ls=":", label="-18 C benchmark")
    # Each kind of event as one collection (a busy week has hundreds of door openings).
    spans = {"defrost": [], "excursion": [], "door": []}
    for r in events.itertuples():
        if r.kind in spans:
            a, b = _days([max(r.start_ts, start_ts), min(r.end_ts if pd.notna(r.end_ts) else end_ts, end_ts)])
            spans[r.kind].append((a, b - a))
    across = top.get_xaxis_transform()  # x in data, y in the axes' own 0..1
    for kind, colour, alpha in (("defrost", "#e0a030", 0.25), ("excursion", "#c4573a", 0.18)):
        if spans[kind]:
            top.broken_barh(spans[kind], (0.0, 1.0), transform=across, color=colour, alpha=alpha, lw=0)
    if spans["door"]:
        top.vlines([a for a, _ in spans["door"]], 0.0, 0.06, transform=across, color="#4f8fbf", lw=0.8)
    top.set_ylabel("C")
    top.set_title(title, loc="left", fontsize=9)
    top.legend(loc="upper right", ncol=4, fontsize=6.5, frameon=False)
    top.text(
        0.0,
        -0.02,
        "shaded: defrosts (amber), excursions (red); ticks at the foot: door openings",
        transform=top.transAxes,
        fontsize=6,
        color="#666",
        va="top",
    )
    if model is not None and model.trace_ts.size:
        bottom.plot(
            _days(model.trace_ts),
            model.mean_diameter_um,
            color=SIZE,
            lw=1.2,
            label=f"mean crystal ({model.position})",
        )
        bottom.axhline(model.limit_um, color=LIMIT, lw=0.8, ls="--", label=f"limit {model.limit_um:g} um")
        lo = float(np.nanmin(model.mean_diameter_um))
        bottom.set_ylim(lo - 1.0, max(model.limit_um, float(np.nanmax(model.mean_diameter_um))) + 1.0)
        bottom.legend(loc="lower right", fontsize=6.5, frameon=False)
    bottom.set_ylabel("um")
    bottom.set_xlim(x0, x1)
    if end_ts - start_ts <= 2 * 86400.0:  # a day or two: hours, the day named at midnight
        bottom.xaxis.set_major_locator(mdates.HourLocator(byhour=range(0, 24, 3), tz=zone))
        bottom.xaxis.set_major_formatter(mdates.DateFormatter("%H:%M", tz=zone))
    else:
        bottom.xaxis.set_major_locator(mdates.DayLocator(tz=zone))
        bottom.xaxis.set_major_formatter(mdates.DateFormatter("%a %d", tz=zone))
    return _svg(fig)


def growth_bars(growth: pd.DataFrame, title: str) -> str:
    """Daily growth stacked by cause (the unattributed remainder is left out of the bars)."""
    days = growth[growth["day"] != "week"]
    fig, ax = plt.subplots(figsize=(7.0, 2.2))
    bottom = np.zeros(len(days))
    labels = [d[5:] for d in days["day"]]
    for col, (name, colour) in CAUSES.items():
        values = days[col].clip(lower=0).to_numpy() if len(days) else np.zeros(0)
        ax.bar(labels, values, bottom=bottom, color=colour, label=name, width=0.6)
        bottom += values
    ax.set_ylabel("um of mean diameter")
    ax.set_title(title, loc="left", fontsize=9)
    ax.legend(fontsize=6.5, frameon=False, ncol=4, loc="upper left")
    return _svg(fig, left_in=0.85)  # room for tick labels such as 0.0150


def hour_bars(by_hour: pd.DataFrame, title: str) -> str:
    fig, ax = plt.subplots(figsize=(7.0, 1.6))
    ax.bar(by_hour["hour"], by_hour["openings"], color="#4f8fbf", width=0.7)
    ax.set_xticks(range(0, 24, 2))
    ax.set_xlabel("hour of day (site time)")
    ax.set_title(title, loc="left", fontsize=9)
    return _svg(fig, bottom_in=0.45)


def whatif_chart(result: dict, time_ts, tz: str, title: str) -> str:
    """The recorded and the changed air above; the texture budget used by each below."""
    fig, (top, bottom) = plt.subplots(2, 1, figsize=(7.0, 3.9), sharex=True, height_ratios=(1, 1))
    step = max(1, len(time_ts) // 2000)
    t = _days(np.asarray(time_ts)[::step])
    top.plot(t, np.asarray(result["air_recorded_c"])[::step], color="#9aa5b1", lw=0.8, label="air as recorded")
    top.plot(t, np.asarray(result["air_changed_c"])[::step], color=AIR, lw=0.9, label="air with the change")
    top.set_ylabel("C")
    top.set_title(title, loc="left", fontsize=9)
    top.legend(loc="upper right", ncol=2, fontsize=6.5, frameon=False)
    tt = _days(result["trace_ts"])
    bottom.plot(tt, result["trace_recorded_pct"], color="#9aa5b1", lw=1.2, label="as recorded")
    bottom.plot(tt, result["trace_changed_pct"], color=SIZE, lw=1.2, label="with the change")
    bottom.set_ylabel("% of texture budget")
    bottom.legend(loc="upper left", fontsize=6.5, frameon=False)
    zone = ZoneInfo(tz)
    locator = mdates.AutoDateLocator(tz=zone, minticks=3, maxticks=8)
    bottom.xaxis.set_major_locator(locator)  # hours for a short period, days for a long one
    bottom.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator, tz=zone))
    return _svg(fig)
