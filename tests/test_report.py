"""The weekly summary: each figure against the same figure computed here from the database rows,
the HTML in headless Chromium, a week with a gap, a zone with no events, a daylight-saving week,
the schedule, and the report's record heads."""

from __future__ import annotations

import json
import shutil
import sqlite3
import subprocess
import sys

import numpy as np
import pytest

from tests.report_site import play_site, site_config, ts
from watcher.engine.batch import Engine, Message
from watcher.report.produce import produce
from watcher.report.schedule import due_weeks
from watcher.report.week import week_of
from watcher.store import chain
from watcher.store.db import Store

FAULT = (ts(2026, 11, 19, 13), ts(2026, 11, 19, 16))
OUTAGE = (ts(2026, 11, 20, 2), ts(2026, 11, 20, 4))
GENERATED = ts(2026, 11, 25, 6)


@pytest.fixture(scope="module")
def w47(tmp_path_factory):
    folder = tmp_path_factory.mktemp("w47")
    cfg, store = play_site(folder, ts(2026, 11, 14), 10.0, FAULT, OUTAGE)
    week = week_of("2026-W47", "Europe/London")
    paths = produce(
        store, cfg, cfg.sites[0], week, GENERATED, str(folder / "out"), ("html", "csv", "json"), False, False
    )
    data = json.loads(next(p for p in paths if p.suffix == ".json").read_text())
    return cfg, store, week, paths, data, sqlite3.connect(cfg.storage.path)


def zone(data, zid):
    return next(z for z in data["zones"] if z["zone"] == zid)


def test_door_and_defrost_figures_match_the_events_table(w47):
    """The summary's door and defrost figures equal those computed here from the events table."""
    _, _, week, _, data, db = w47
    rows = db.execute(
        "SELECT kind, start_ts, coalesce(end_ts, ?) FROM events WHERE zone = 'bulk-a' AND start_ts < ? AND "
        "(end_ts IS NULL OR end_ts > ?)",
        (week.end_ts, week.end_ts, week.start_ts),
    ).fetchall()
    doors = [(e - s) for k, s, e in rows if k == "door"]
    defrosts = [(e - s) for k, s, e in rows if k == "defrost"]
    z = zone(data, "bulk-a")
    assert z["doors"]["count"] == len(doors) > 20
    assert z["doors"]["total_open_min"] == pytest.approx(sum(doors) / 60.0)
    assert z["doors"]["longest_min"] == pytest.approx(max(doors) / 60.0)
    assert sum(h["openings"] for h in z["doors_by_hour"]) == len(doors)
    assert z["defrosts"]["count"] == len(defrosts) == 21  # every 8 h over 7 days, signalled
    assert z["defrosts"]["mean_min"] == pytest.approx(np.mean(defrosts) / 60.0)
    assert z["defrosts"]["inferred"] == 0
    peaks = [
        db.execute(
            "SELECT max(value) FROM readings WHERE zone = 'bulk-a' AND signal = 'air_c' AND ts >= ? AND ts <= ? "
            "AND ts >= ? AND ts < ?",
            (s, e, week.start_ts, week.end_ts),
        ).fetchone()[0]
        for k, s, e in rows
        if k == "defrost"
    ]
    assert z["defrosts"]["peak_air_c"] == pytest.approx(max(peaks))
    excursions = [r for r in rows if r[0] == "excursion"]
    assert len(z["excursions"]) == len(excursions) == 1
    assert z["excursions"][0]["minutes"] == pytest.approx((excursions[0][2] - excursions[0][1]) / 60.0, abs=1)


def test_temperature_figures_match_the_readings(w47):
    """Air min, mean, max and hours above -18 C from the raw rows (one sensor on whole
    minutes, so the report's one-minute bins are the readings themselves)."""
    _, _, week, _, data, db = w47
    rows = np.array(
        db.execute(
            "SELECT ts, value FROM readings WHERE zone = 'bulk-a' AND signal = 'air_c' AND ts >= ? AND ts < ? ORDER BY ts",
            (week.start_ts, week.end_ts),
        ).fetchall()
    )
    air = next(r for r in zone(data, "bulk-a")["temperatures"] if r["series"] == "air")
    assert air["samples"] == len(rows)
    assert (air["min_c"], air["max_c"]) == (rows[:, 1].min(), rows[:, 1].max())
    assert air["mean_c"] == pytest.approx(rows[:, 1].mean())
    held = np.diff(np.append(rows[:, 0], week.end_ts))
    key = next(k for k in air if k.startswith("hours above -18 C"))
    assert air[key] == pytest.approx(held[rows[:, 1] > -18.0].sum() / 3600.0)
    assert air[key] == pytest.approx(3.0, abs=0.05)  # the 3-hour fault at -16 C; defrosts peak at -18.0


def test_growth_completeness_gaps_alerts_match_their_tables(w47):
    """The summary's growth, completeness, gaps and alerts equal the stored rows they come from."""
    _, _, week, _, data, db = w47
    days = [d for d, _, _ in week.days()]
    growth = {r["day"]: r for r in zone(data, "bulk-a")["growth"]}
    stored = db.execute(
        f"SELECT day, baseline_um, excursion_um, total_excess_um FROM daily_growth WHERE zone = 'bulk-a' AND day IN ({','.join('?' * 7)})",
        days,
    ).fetchall()
    assert len(stored) >= 5 and {d for d, *_ in stored} <= set(growth)
    for day, base, exc, total in stored:
        assert (growth[day]["baseline_um"], growth[day]["excursion_um"], growth[day]["total_excess_um"]) == (
            base,
            exc,
            total,
        )
    assert growth["week"]["baseline_um"] == pytest.approx(sum(r[1] for r in stored))
    assert growth["2026-11-19"]["excursion_um"] > 0.1  # the fault's day
    comp = {(r["zone"], r["sensor"], r["signal"]): r for r in data["completeness"]}
    for zid, sensor, signal, n, late in db.execute(
        "SELECT zone, sensor, signal, count(*), sum(late) FROM readings WHERE ts >= ? AND ts < ? "
        "GROUP BY zone, sensor, signal",
        (week.start_ts, week.end_ts),
    ):
        assert (comp[(zid, sensor, signal)]["received"], comp[(zid, sensor, signal)]["late"]) == (n, late)
    assert len(comp) == len({(r["zone"], r["sensor"], r["signal"]) for r in data["completeness"]})
    assert comp[("bulk-a", "s1", "air_c")]["expected"] == 7 * 1440
    assert comp[("bulk-a", "s1", "air_c")]["received"] == 7 * 1440 - 120  # the 2-hour outage
    assert comp[("bulk-a", "dock", "door")]["expected"] is None  # reports on change only
    gaps = db.execute(
        "SELECT zone, start_ts, end_ts FROM gaps WHERE start_ts < ? AND end_ts > ?", (week.end_ts, week.start_ts)
    ).fetchall()
    assert [(g["zone"], g["start_ts"], g["end_ts"]) for g in data["gaps"]] == gaps
    assert gaps[0][0] == "bulk-a" and gaps[0][2] - gaps[0][1] == pytest.approx(121 * 60)
    alerts = db.execute(
        "SELECT id FROM alerts WHERE raised_ts < ? AND (cleared_ts IS NULL OR cleared_ts >= ?)",
        (week.end_ts, week.start_ts),
    ).fetchall()
    assert sorted(a["id"] for a in data["alerts"]) == sorted(a for (a,) in alerts)
    n_rej = db.execute(
        "SELECT count(*) FROM rejections WHERE received_ts >= ? AND received_ts < ?", (week.start_ts, week.end_ts)
    ).fetchone()[0]
    assert sum(r["messages"] for r in data["rejections"]) == n_rej


def test_budget_and_record_heads(w47):
    """Budget grows over the week; the printed heads are the chains' heads and verify."""
    _, store, _, _, data, db = w47
    b = zone(data, "bulk-a")["budget"]
    assert 0 < b["start_pct"] < b["end_pct"] < 100 and b["mean_start_um"] < b["mean_end_um"] < b["limit_um"]
    # The 90 % ranges and the additive rule ride beside the budget; the rule, blind to what
    # the defrosts' melt-refreeze adds, never says more than the model.
    assert b["budget_used_pct_low"] <= b["end_pct"] <= b["budget_used_pct_high"]
    assert b["days_to_limit_low"] <= b["days_to_limit"] <= b["days_to_limit_high"]
    assert b["start_pct"] < b["additive_rule_end_pct"] <= b["end_pct"]
    assert data["integrity"]["heads"] == chain.heads(db)
    assert data["integrity"]["digest"] == chain.digest(chain.heads(db))
    (stored,) = db.execute("SELECT digest FROM reports").fetchone()
    assert stored == data["integrity"]["digest"]
    findings, _ = chain.verify(db)
    assert findings == [] and chain.check_reports(db) == []
    assert "not a legal limit for ice cream" in " ".join(data["cautions"])
    assert all(len(v) == 3 and v[2] >= 1 for v in data["integrity"]["heads"].values())  # lengths pinned too


def test_summary_files_are_readable_by_owner_and_group_only(w47):
    """The summary's files are written 0640, also outside systemd."""
    _, _, _, paths, _, _ = w47
    assert paths and {p.stat().st_mode & 0o777 for p in paths} == {0o640}


def test_a_zone_without_events(w47):
    """Dispatch held its setpoint: no doors, defrosts or excursions, no excess, baseline only."""
    data = w47[4]
    z = zone(data, "dispatch")
    assert z["doors"]["count"] == 0 and z["defrosts"]["count"] == 0 and z["excursions"] == []
    assert all(abs(r["total_excess_um"]) < 1e-9 and r["baseline_um"] > 0 for r in z["growth"])


def test_csv_files_hold_the_tables(w47):
    """The CSV tables are written, one row per day of growth as in the JSON."""
    paths, data = w47[3], w47[4]
    names = {p.name for p in paths}
    assert "kestrel-2026-W47-bulk-a-growth.csv" in names and "kestrel-2026-W47-alerts.csv" in names
    growth_csv = next(p for p in paths if p.name.endswith("bulk-a-growth.csv")).read_text().splitlines()
    assert len(growth_csv) == 1 + len(zone(data, "bulk-a")["growth"])


def chromium() -> str:
    exe = shutil.which("chromium") or shutil.which("chromium-browser")
    if exe is None:
        pytest.fail("chromium is missing: scripts/test.sh installs Debian's chromium package")
    return exe


HEADLESS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--hide-scrollbars",
]


def test_html_renders_in_headless_chromium(w47, tmp_path):
    """No console errors, every chart present as inline SVG, nothing fetched from outside; a
    PNG screenshot is saved under the test's folder."""
    html_path = w47[3][0]
    text = html_path.read_text()
    for ref in ('src="http', "src='http", 'href="http', "href='http", "url(http", "@import", "<script"):
        assert ref not in text  # self-contained: nothing to fetch, nothing to run
    base = [chromium(), *HEADLESS, f"--user-data-dir={tmp_path / 'profile'}", "--enable-logging=stderr", "--v=0"]
    dom = subprocess.run([*base, "--dump-dom", html_path.as_uri()], capture_output=True, text=True, timeout=120)
    assert dom.returncode == 0, dom.stderr[-2000:]
    assert dom.stdout.count("<svg") == 5  # bulk-a: trace, growth, doors; dispatch: trace, growth
    assert 'id="zone-bulk-a"' in dom.stdout and "Record integrity" in dom.stdout
    console = [line for line in dom.stderr.splitlines() if "CONSOLE" in line or "Uncaught" in line]
    assert console == []
    shot = tmp_path / "weekly-summary.png"
    run = subprocess.run(
        [*base, "--window-size=1000,2400", f"--screenshot={shot}", html_path.as_uri()],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert run.returncode == 0 and shot.stat().st_size > 50_000
    assert [line for line in run.stderr.splitlines() if "CONSOLE" in line] == []


def test_daylight_saving_week(tmp_path):
    """2026-W43 ends on the Sunday clocks go back in London: 169 hours, seven local days, one
    of 25 hours, and door openings counted by local hour."""
    cfg, store = play_site(tmp_path, ts(2026, 10, 17), 11.0, (0.0, 0.0), (0.0, 0.0))
    week = week_of("2026-W43", "Europe/London")
    assert week.end_ts - week.start_ts == 169 * 3600
    days = week.days()
    assert [d for d, _, _ in days][-1] == "2026-10-25" and days[-1][2] - days[-1][1] == 25 * 3600
    paths = produce(store, cfg, cfg.sites[0], week, ts(2026, 10, 28), str(tmp_path / "out"), ("json",), False, False)
    data = json.loads(paths[0].read_text())
    comp = {(r["zone"], r["signal"]): r for r in data["completeness"]}
    assert comp[("dispatch", "air_c")]["expected"] == 169 * 60 == comp[("dispatch", "air_c")]["received"]
    # The publisher opens doors between 08:00 and 17:00 UTC: 09-17 local in summer time (BST)
    # and 08-16 local on the last day, after the change back to GMT.
    db = sqlite3.connect(cfg.storage.path)
    local_hours = db.execute(
        "SELECT CAST(strftime('%H', start_ts, 'unixepoch') AS INTEGER) + CASE WHEN start_ts < ? THEN 1 ELSE 0 END "
        "FROM events WHERE zone = 'bulk-a' AND kind = 'door' AND start_ts >= ? AND start_ts < ?",
        (ts(2026, 10, 25, 1), week.start_ts, week.end_ts),
    ).fetchall()
    by_hour = {h["hour"]: h["openings"] for h in zone(data, "bulk-a")["doors_by_hour"]}
    for hour in range(24):
        assert by_hour[hour] == sum(1 for (h,) in local_hours if h == hour)
    # The daily figure covers the long day. (Its baseline is not compared with the day before:
    # the population's daily increments jitter by 10-20 %, see docs/events.md.)
    (span,) = db.execute(
        "SELECT end_ts - start_ts FROM daily_growth WHERE zone = 'dispatch' AND day = '2026-10-25'"
    ).fetchone()
    assert span == 25 * 3600
    assert "2026-10-25" in {r["day"] for r in zone(data, "dispatch")["growth"]}


def test_schedule_produces_each_week_once(w47):
    """Due on the configured weekday and time in the site's zone; once produced by the schedule,
    not again (the record is in the database, so this holds across restarts)."""
    cfg, store = w47[0], w47[1]
    monday_0559 = ts(2026, 11, 30, 5, 59)  # London is on GMT: 05:59 local
    assert due_weeks(store, cfg, monday_0559) == []
    due = due_weeks(store, cfg, monday_0559 + 60)
    assert [(s.id, w.label) for s, w in due] == [("kestrel", "2026-W48")]
    produce(store, cfg, due[0][0], due[0][1], monday_0559 + 60, str(cfg.reports.dir), ("json",), False, True)
    assert due_weeks(store, cfg, monday_0559 + 3600) == []


def _stopping_zone(folder):
    """bulk-a at -25 C on Sunday 22 Nov, at -15 C from Monday 23 Nov 00:00 to Tuesday 12:00
    (36 h), a door opened at Tuesday 11:00 and never closed; then its data stop. dispatch
    steady at -22 C all along."""
    cfg = site_config(folder)
    store = Store(cfg.storage.path)
    engine = Engine(cfg, store, checkpoint_s=0.0)
    start, received = ts(2026, 11, 22), ts(2026, 11, 26, 12)
    batch = []
    for k in range(int(4.5 * 1440)):
        t = start + 60.0 * k
        if k < 60 * 60:
            air = -25.0 if k < 24 * 60 else -15.0
            batch.append(Message("kp/bulk-a/s1/air", json.dumps({"t": air, "ts": t}).encode(), received, 0, 1))
        batch.append(Message("kp/dispatch/s1/air", json.dumps({"t": -22.0, "ts": t}).encode(), received, 0, 1))
        if k == 59 * 60:
            batch.append(Message("kp/bulk-a/dock/door", json.dumps({"open": 1, "ts": t}).encode(), received, 0, 1))
    for lo in range(0, len(batch), 500):
        engine.process(batch[lo : lo + 500], now=received)
    engine.checkpoint_all(received)
    return cfg, store


def test_a_week_in_progress_says_so_and_no_duration_runs_past_the_last_reading(tmp_path):
    """W48 asked for on Thursday: the HTML, every CSV and the JSON say 'in progress, up to';
    bulk-a's data stop on Tuesday at noon, so its hours above -18 C and its open door stop
    there too (they are not held to now, nor to the week's end); the same holds once the week
    is over; a week that has not begun is refused with exit code 2."""
    cfg, store = _stopping_zone(tmp_path)
    week = week_of("2026-W48", "Europe/London")
    now = ts(2026, 11, 26, 12)
    paths = produce(store, cfg, cfg.sites[0], week, now, str(tmp_path / "now"), ("html", "csv", "json"), False, False)
    data = json.loads(next(p for p in paths if p.suffix == ".json").read_text())
    assert data["in_progress"] is True and data["upto_ts"] == now
    assert "in progress, up to 2026-11-26 12:00 GMT" in next(p for p in paths if p.suffix == ".html").read_text()
    assert "(in progress, up to" in data["summary"]
    for csv in (p for p in paths if p.suffix == ".csv"):
        assert "week_in_progress_up_to" in csv.read_text().splitlines()[0], csv.name
    air = next(r for r in zone(data, "bulk-a")["temperatures"] if r["series"] == "air")
    above = next(v for k, v in air.items() if k.startswith("hours above -18 C"))
    assert above == pytest.approx(36.0, abs=0.05)  # not 84 h (to now) nor 168 h (to the week's end)
    assert zone(data, "bulk-a")["doors"]["total_open_min"] == pytest.approx(60.0, abs=1.0)
    comp = {(r["zone"], r["signal"]): r for r in data["completeness"]}
    assert comp[("bulk-a", "air_c")]["expected"] == 84 * 60  # counted to now: the stop shows as missing data

    later = produce(store, cfg, cfg.sites[0], week, ts(2026, 12, 1), str(tmp_path / "after"), ("json",), False, False)
    whole = json.loads(later[0].read_text())
    air = next(r for r in zone(whole, "bulk-a")["temperatures"] if r["series"] == "air")
    assert whole["in_progress"] is False and whole["upto_ts"] == week.end_ts
    assert next(v for k, v in air.items() if k.startswith("hours above -18 C")) == pytest.approx(36.0, abs=0.05)

    config = tmp_path / "kestrel.toml"
    config.write_text(
        f'[broker]\npassword_file = "{tmp_path / "pw"}"\n[storage]\npath = "{cfg.storage.path}"\n'
        '[[sites]]\nid = "kestrel"\ntimezone = "Europe/London"\n[[zones]]\nid = "bulk-a"\nsetpoint_c = -25.0\n'
        '[[sources]]\npattern = "kp/{zone}/{sensor}/air"\nsignal = "air_c"\n'
    )
    out = subprocess.run(
        [
            sys.executable,
            "-m",
            "watcher",
            "report",
            "--config",
            str(config),
            "--week",
            "2030-W01",
            "--out",
            str(tmp_path),
        ],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert out.returncode == 2 and "--week: got '2030-W01', expected a week that has begun" in out.stderr, out.stderr


def test_sensor_weeks_counts_late_readings_and_reads_one_sensor_at_a_time(tmp_path):
    """The summary's per-sensor rows: every sensor with readings in the week, its times in
    order and its late readings (found through the partial index), nothing outside the week."""
    from watcher.ingest.payload import Reading
    from watcher.store.db import Store

    store = Store(str(tmp_path / "w.db"))
    week0 = 1_795_000_000.0
    with store.atomic():
        for k in range(30):
            for sensor in ("s1", "s2"):
                store.readings.add(Reading("bulk-a", sensor, "air_c", week0 + 60 * k, -25.0), 0.0, "t", late=k % 7 == 0)
        store.readings.add(Reading("bulk-a", "s1", "air_c", week0 - 60, -25.0), 0.0, "t", late=True)  # before the week
        store.readings.add(Reading("bulk-a", "dock", "door", week0 + 5, 1.0), 0.0, "t", late=True)
    rows = list(store.reports.sensor_weeks(("bulk-a", "dispatch"), week0, week0 + 7 * 86400))
    store.close()
    got = {(z, s, sig): (times, late) for z, s, sig, times, late in rows}
    assert set(got) == {("bulk-a", "dock", "door"), ("bulk-a", "s1", "air_c"), ("bulk-a", "s2", "air_c")}
    assert got[("bulk-a", "s1", "air_c")] == ([week0 + 60 * k for k in range(30)], 5)  # k = 0, 7, 14, 21, 28
    assert got[("bulk-a", "dock", "door")] == ([week0 + 5], 1)


def test_a_central_records_site_summary_lists_that_sites_rejections_only(tmp_path):
    """A central watcher of two sites: Kestrel Point's summary counts the messages refused on
    Kestrel Point's topics and those no site can claim (a zone nobody configured), not Harbour
    Row's; Harbour Row's likewise (derived: the messages sent)."""
    from watcher.config import config_from_dict
    from watcher.ingest.message import Message as Msg

    (tmp_path / "pw").write_text("x\n")
    (tmp_path / "pw").chmod(0o600)
    cfg = config_from_dict(
        {
            "broker": {"password_file": str(tmp_path / "pw")},
            "storage": {"path": str(tmp_path / "central.db")},
            "sites": [{"id": "kestrel", "timezone": "UTC"}, {"id": "harbour", "timezone": "UTC"}],
            "zones": [
                {"id": "kestrel-bulk-a", "site": "kestrel", "setpoint_c": -25.0},
                {"id": "harbour-store-1", "site": "harbour", "setpoint_c": -25.0},
            ],
            "sources": [{"pattern": "fleet/{site}/{zone}/{sensor}/air", "zone": "{site}-{zone}", "signal": "air_c"}],
        },
        "central.toml",
    )
    store = Store(cfg.storage.path)
    engine = Engine(cfg, store)
    start = ts(2026, 11, 16)
    for m in range(0, 6 * 60, 10):
        at = start + 60.0 * m
        ok = [
            Msg(f"fleet/{s}/{z}/s1/air", b'{"value": -25.0}', at, 0, 1)
            for s, z in (("kestrel", "bulk-a"), ("harbour", "store-1"))
        ]
        engine.process(ok, now=at)
    bad = {"kestrel": 3, "harbour": 5, "depot": 2}  # depot: a site nobody configured
    at = start + 7 * 3600.0
    zones = {"kestrel": "bulk-a", "harbour": "store-1", "depot": "bulk-a"}
    refused = [Msg(f"fleet/{s}/{zones[s]}/s1/air", b"{not json", at, 0, 1) for s, n in bad.items() for _ in range(n)]
    engine.process(refused, now=at)
    week = week_of("2026-W47", "UTC")
    for site in cfg.sites:
        (path,) = produce(store, cfg, site, week, ts(2026, 11, 25), str(tmp_path / site.id), ("json",), False, False)
        refused = sum(r["messages"] for r in json.loads(path.read_text())["rejections"])
        assert refused == bad[site.id] + bad["depot"], site.id
    store.close()
