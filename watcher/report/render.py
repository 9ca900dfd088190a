"""Write a Report as self-contained HTML (inline SVG, print CSS), CSV per table, and JSON."""

from __future__ import annotations

import datetime as dt
import html
import json
import math
from pathlib import Path
from zoneinfo import ZoneInfo

import pandas as pd

from watcher.ranges import with_range
from watcher.report.build import Report

FORMATS = ("html", "csv", "json")

CSS = """
:root { --ink:#1d2730; --muted:#5b6770; --rule:#d5dadd; --band:#eef3f4; --accent:#1f6f78; }
* { box-sizing: border-box; }
body { font: 14px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif;
       color: var(--ink); margin: 0 auto; max-width: 980px; padding: 24px; }
header { border-bottom: 3px solid var(--accent); margin-bottom: 14px; }
header h1 { font-size: 22px; margin: 0 0 2px; }
header p { margin: 0 0 10px; color: var(--muted); }
h2 { font-size: 17px; margin: 26px 0 8px; border-bottom: 1px solid var(--rule); padding-bottom: 3px; }
h3 { font-size: 14px; margin: 16px 0 6px; }
.progress { background: #fff4d6; border-left: 4px solid #b7791f; padding: 10px 14px; font-weight: 600; }
.progress-mark { display: none; }
.summary { background: var(--band); padding: 12px 14px; border-left: 4px solid var(--accent); }
table { border-collapse: collapse; width: 100%; margin: 6px 0 12px; font-size: 12.5px; }
th, td { padding: 3px 6px; border-bottom: 1px solid var(--rule); text-align: right; vertical-align: top; }
th { background: var(--band); font-weight: 600; }
th:first-child, td:first-child, td.text, th.text { text-align: left; }
.facts { display: grid; grid-template-columns: repeat(auto-fill, minmax(210px, 1fr)); gap: 4px 16px; margin: 6px 0; }
.facts div { border-bottom: 1px dotted var(--rule); }
.facts b { font-weight: 600; }
figure { margin: 8px 0; }
figure svg { width: 100%; height: auto; }
.note { color: var(--muted); font-size: 12px; }
.caution { border: 1px solid #c9a227; background: #fbf6e4; padding: 8px 12px; font-size: 12.5px; }
code { font-size: 11.5px; word-break: break-all; }
@media print {
  .progress-mark { display: block; position: fixed; top: 0; right: 0; font-size: 10px; color: #b7791f; }
  @page { margin: 14mm; }          /* A4 and Letter alike: content kept within 180 mm */
  body { max-width: 180mm; padding: 0; font-size: 10.5pt; }
  section.zone { break-before: page; }
  table, figure, .facts, .caution { break-inside: avoid; }
  .summary { -webkit-print-color-adjust: exact; print-color-adjust: exact; }
}
"""


def _cell(v) -> str:
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return ""
    if isinstance(v, float):
        return f"{v:.3f}" if abs(v) < 1 and v != 0 else f"{v:.1f}"
    return html.escape(str(v))


def table_html(df: pd.DataFrame, empty: str = "None this week.") -> str:
    if df is None or df.empty:
        return f'<p class="note">{html.escape(empty)}</p>'
    head = "".join(f"<th>{html.escape(str(c)).replace('_', ' ')}</th>" for c in df.columns)
    body = "".join(
        "<tr>" + "".join(f"<td>{_cell(v)}</td>" for v in row) + "</tr>" for row in df.itertuples(index=False)
    )
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _facts(items: list[tuple[str, str]]) -> str:
    return (
        '<div class="facts">'
        + "".join(f"<div>{html.escape(k)}: <b>{html.escape(v)}</b></div>" for k, v in items)
        + "</div>"
    )


def _n(v, fmt=".1f", unit="") -> str:
    return "n/a" if v is None or (isinstance(v, float) and math.isnan(v)) else f"{format(v, fmt)}{unit}"


def _local(ts: float, tz: str) -> str:
    return dt.datetime.fromtimestamp(ts, ZoneInfo(tz)).strftime("%Y-%m-%d %H:%M %Z")


def _glance(r: Report) -> pd.DataFrame:
    rows = []
    for z in r.zones:
        week = z.growth[z.growth["day"] == "week"]
        g = week.iloc[0] if len(week) else None
        rows.append(
            {
                "zone": z.name,
                "setpoint C": z.setpoint_c,
                "budget at start %": z.budget["start_pct"],
                "budget at end %": z.budget["end_pct"],
                "used this week %": z.budget["used_in_week_pct"],
                "days to limit": z.budget["days_to_limit"],
                "90 % range, days": _range_only(z.budget, "days_to_limit", ".0f"),
                "mean crystal um": z.budget["mean_end_um"],
                "baseline um": None if g is None else g["baseline_um"],
                "excess um": None if g is None else g["total_excess_um"],
            }
        )
    return pd.DataFrame(rows)


def _with_range(b: dict, key: str, value_key: str, spec: str, unit: str) -> str:
    """A summary figure with its 90 % range, e.g. '12.3 (8.1-19.0) %'."""
    if b.get(value_key) is None:
        return _n(None, spec, unit)
    return with_range(b[value_key], b.get(f"{key}_low"), b.get(f"{key}_high"), spec) + unit


def _range_only(b: dict, key: str, spec: str) -> str | None:
    low, high = b.get(f"{key}_low"), b.get(f"{key}_high")
    if low is None and high is None:
        return None
    return f"{_n(low, spec)}-{_n(high, spec)}"


def zone_html(z, tz: str) -> str:
    b, d, f = z.budget, z.doors, z.defrosts
    parts = [
        f'<section class="zone" id="zone-{html.escape(z.zone)}"><h2>{html.escape(z.name)} '
        f'<span class="note">({html.escape(z.zone)}, setpoint {z.setpoint_c:g} C, profile {html.escape(z.profile)})</span></h2>',
        _facts(
            [
                ("Texture budget at start", _n(b["start_pct"], ".1f", " %")),
                ("at end (90 % range)", _with_range(b, "budget_used_pct", "end_pct", ".1f", " %")),
                (
                    "at end by the additive rule (time / life at each temperature)",
                    _n(b["additive_rule_end_pct"], ".1f", " %"),
                ),
                (
                    "Days to the limit (end of week; 90 % range)",
                    _with_range(b, "days_to_limit", "days_to_limit", ".0f", " days"),
                ),
                ("Mean crystal", f"{_n(b['mean_start_um'])} to {_n(b['mean_end_um'])} um (limit {b['limit_um']:g} um)"),
                ("Worst position", str(b["position"])),
            ]
        ),
        f'<p class="note">Model figures {html.escape(z.model_note)}.</p>',
        f"<figure>{z.charts.get('trace', '')}</figure>",
        "<h3>Temperatures</h3>",
        table_html(z.temperatures, "No temperature readings this week."),
        "<h3>Growth by cause</h3>",
        '<p class="note">Baseline: growth the week would have had at the setpoint. Causes: extra growth from each '
        "kind of event, measured after its recovery tail; unattributed: interactions and warm time that is no event. "
        "Days whose tail is not yet covered by data are not listed.</p>",
        table_html(z.growth, "No daily figures yet for this week."),
        f"<figure>{z.charts.get('growth', '')}</figure>" if "growth" in z.charts else "",
        "<h3>Door openings</h3>",
        _facts(
            [
                ("Openings", str(d["count"])),
                ("Total open", _n(d["total_open_min"], ".0f", " min")),
                ("Longest", _n(d["longest_min"], ".1f", " min")),
            ]
        ),
        f"<figure>{z.charts.get('doors', '')}</figure>" if "doors" in z.charts else "",
        "<h3>Defrosts</h3>",
        _facts(
            [
                ("Defrosts", f"{f['count']} ({f['inferred']} inferred from the air)" if f["count"] else "0"),
                ("Mean duration", _n(f["mean_min"], ".0f", " min")),
                ("Longest", _n(f["longest_min"], ".0f", " min")),
                ("Peak air", _n(f["peak_air_c"], ".1f", " C")),
            ]
        ),
        "<h3>Excursions</h3>",
        table_html(z.excursions, "No excursions this week."),
        "</section>",
    ]
    return "\n".join(parts)


def _sections_html(r: Report) -> list[str]:
    """The site-wide tables: a level-2 section opens a <section>, a level-3 one continues it."""
    out: list[str] = []
    for x in r.sections:
        if x.level == 2:
            out += ["</section>"] if out else []
            out += ["<section>", f"<h2>{html.escape(x.title)}</h2>"]
        else:
            out.append(f"<h3>{html.escape(x.title)}</h3>")
        if x.note:
            out.append(f'<p class="note">{html.escape(x.note)}</p>')
        if x.empty or not x.frame.empty:
            out.append(table_html(x.frame, x.empty))
    return out + ["</section>"] if out else out


def to_html(r: Report) -> str:
    tz = r.site.timezone
    progress = f"in progress, up to {_local(r.upto_ts, tz)}" if r.in_progress else ""
    title = f"Texture watch, week {r.week.label}{' (' + progress + ')' if progress else ''}: {r.site.name or r.site.id}"
    body = [
        f"<header><h1>{html.escape(title)}</h1><p>{_local(r.week.start_ts, tz)} to {_local(r.week.end_ts, tz)} "
        f"({r.week.end_ts / 3600 - r.week.start_ts / 3600:.0f} h). Generated {_local(r.generated_ts, tz)}.</p></header>",
        *(
            [
                f'<p class="progress-mark">Week {r.week.label} {html.escape(progress)}</p>',
                f'<p class="progress">This week is {html.escape(progress)}: every figure covers the week so far '
                "and will change. The summary for the whole week is written once it has ended.</p>",
            ]
            if progress
            else []
        ),
        f'<p class="summary">{html.escape(r.summary)}</p>',
        "<h2>At a glance</h2>",
        table_html(_glance(r)),
        *[zone_html(z, tz) for z in r.zones],
        *_sections_html(r),
        "<section><h2>Record integrity</h2>",
        "<p>Each chain's newest row and its length (rows ever held, those retention folded included) when this "
        "summary was made. <code>watcher verify</code> recomputes the chains and checks these values: a later "
        "change to the stored record, or rows cut from it, shows.</p>",
        table_html(
            pd.DataFrame(
                [
                    {"chain": k, "row": v[0], "rows": v[2] if len(v) > 2 else None, "hash": v[1]}
                    for k, v in sorted(r.heads.items())
                ]
            )
        ),
        f"<p>Digest of this record: <code>{r.digest}</code></p>",
        f'<p class="note">watcher {html.escape(r.versions["watcher"])}, model {html.escape(r.versions["model"])}, '
        f"profiles: {html.escape(', '.join(r.versions['profiles']))}.</p></section>",
        '<section><h2>Cautions</h2><div class="caution">'
        + "".join(f"<p>{html.escape(c)}</p>" for c in r.cautions)
        + "</div></section>",
    ]
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{html.escape(title)}</title><style>{CSS}</style></head><body>\n"
        + "\n".join(body)
        + "\n</body></html>\n"
    )


def _records(df: pd.DataFrame) -> list[dict]:
    """Rows as dicts with full float precision (pandas' own JSON writer keeps 15 digits at most)."""
    if df is None or not len(df):
        return []
    return df.astype(object).where(df.notna(), None).to_dict(orient="records")


def _plain(o):
    return o.item() if hasattr(o, "item") else str(o)


def to_json(r: Report) -> dict:
    return {
        "site": r.site.id,
        "site_name": r.site.name,
        "week": r.week.label,
        "timezone": r.site.timezone,
        "start_ts": r.week.start_ts,
        "end_ts": r.week.end_ts,
        "generated_ts": r.generated_ts,
        "in_progress": r.in_progress,
        "upto_ts": r.upto_ts,
        "summary": r.summary,
        "zones": [
            {
                "zone": z.zone,
                "name": z.name,
                "setpoint_c": z.setpoint_c,
                "profile": z.profile,
                "model_note": z.model_note,
                "budget": z.budget,
                "temperatures": _records(z.temperatures),
                "doors": z.doors,
                "doors_by_hour": _records(z.doors_by_hour),
                "defrosts": z.defrosts,
                "excursions": _records(z.excursions),
                "growth": _records(z.growth),
            }
            for z in r.zones
        ],
        **{
            x.key: {"note": x.note, x.rows_key: _records(x.frame)} if x.rows_key else _records(x.frame)
            for x in r.sections
        },
        "integrity": {"heads": r.heads, "digest": r.digest},
        "versions": r.versions,
        "cautions": r.cautions,
    }


def _utc_iso(time_ts: float) -> str:
    return dt.datetime.fromtimestamp(time_ts, dt.UTC).isoformat(timespec="seconds")


def write(r: Report, out_dir: str | Path, formats=FORMATS) -> list[Path]:
    out = Path(out_dir)
    out.mkdir(mode=0o750, parents=True, exist_ok=True)
    stem = f"{r.site.id}-{r.week.label}"
    paths = []
    if "html" in formats:
        p = out / f"{stem}.html"
        p.write_text(to_html(r), encoding="utf-8")
        paths.append(p)
    if "json" in formats:
        p = out / f"{stem}.json"
        p.write_text(json.dumps(to_json(r), indent=2, default=_plain), encoding="utf-8")
        paths.append(p)
    if "csv" in formats:
        for name, df in r.tables().items():
            p = out / f"{stem}-{name}.csv"
            df = df if df is not None else pd.DataFrame()
            if r.in_progress:  # each file says so, whoever opens it on its own
                df = df.assign(week_in_progress_up_to=_utc_iso(r.upto_ts))
            df.to_csv(p, index=False)
            paths.append(p)
    for p in paths:  # the site's record: owner and group only, also when run by hand outside systemd
        p.chmod(0o640)
    return paths
