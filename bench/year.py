"""A big site's history, grown to a year: what each command costs as the record grows.

A synthetic site of --sensors air sensors (ten a zone) at one reading a minute. History is
grown in steps (default 1, 4 and 13 weeks; --year adds 52). Every week goes through the
service's engine, so the history is what a live site leaves (model state, daily snapshots,
events, daily growth): the older weeks in this process (replay's own path, no CSV), each step's
last --replay-weeks weeks (default 1) as one file through `watcher replay`, whose time and
memory are the replay figures. Then each command runs as its own process and its wall time and
peak resident memory are printed:

- `watcher report` of the last week (HTML, CSV and JSON, as the schedule writes it),
  `watcher verify`, `watcher verify --since` (last week), `watcher status`;
- `verify --since` twice: before the full verify (the week is new since the last mark, as for
  a weekly check) and after it (nothing new: the cost of a check with nothing to hash);
- live ingest on a copy of this database against an empty one, in the same run (median of 3
  each, alternating): messages parsed, stored with the chain, committed with synchronous=FULL
  and fed to the model, a minute of every sensor a batch, timed just after start and eight
  hours on (LIVE_SPANS); the broker's part does not depend on history and is left out
  (bench/service_ingest.py measures it);
- the database's bytes a reading (file size over rows, indexes included).

Usage: python bench/year.py [--sensors 200] [--steps 1,4,13] [--year] [--replay-weeks 1] [--folder DIR]
About a minute and a half of building per week of history on 2 cores (13 weeks: ~25 minutes).
Figures go in DEVELOPERS.md and docs/scaling.md. Timings are single runs on a shared machine:
compare them across steps of one run, not across machines.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from watcher.config import load_config  # noqa: E402
from watcher.engine.batch import Engine, Message  # noqa: E402
from watcher.ingest.payload import Reading  # noqa: E402
from watcher.replay import feed  # noqa: E402
from watcher.store.db import Store  # noqa: E402

WEEK_S = 7 * 86400.0
#: Monday 2026-11-02 00:00 UTC minus 60 weeks: a year of history ends before today.
T0 = 1_793_577_600.0 - 60 * WEEK_S
PER_ZONE = 10


def config_text(folder: Path, zones: int) -> str:
    blocks = "".join(f'[[zones]]\nid = "z{i:02d}"\nsetpoint_c = -25.0\n' for i in range(zones))
    (folder / "pw").write_text("x\n")
    (folder / "pw").chmod(0o600)
    return f"""
[broker]
password_file = "{folder / "pw"}"
[storage]
path = "{folder / "year.db"}"
[reports]
dir = "{folder / "reports"}"
[[sites]]
id = "yr"
name = "Year bench"
timezone = "UTC"
{blocks}
[[sources]]
pattern = "yr/{{zone}}/{{sensor}}/air"
signal = "air_c"
"""


def air_week(start_ts: float, zones: int, seed: int):
    """One week of every sensor at one reading a minute: -25 C with noise and four defrost
    spikes a day (to +8 K for 20 minutes). Yields (ts, zone, sensor, value) minute by minute."""
    rng = np.random.default_rng(seed)
    minutes = np.arange(7 * 1440)
    spike = np.where((minutes % 360) < 20, 8.0 * np.sin(np.pi * (minutes % 360) / 20.0), 0.0)
    for m in minutes:
        ts = start_ts + 60.0 * m
        noise = rng.normal(0.0, 0.3, zones * PER_ZONE)
        for k in range(zones * PER_ZONE):
            yield ts, f"z{k // PER_ZONE:02d}", f"s{k % PER_ZONE}", round(-25.0 + spike[m] + noise[k], 2)


def fill_week(cfg, start_ts: float, zones: int, seed: int) -> int:
    """An older week through the service's engine in this process (replay's own path, without
    a CSV file): model state, daily snapshots, events and daily growth as a live week leaves
    them, so the weeks measured later start from a history like a real one."""
    items = (
        (Reading(zone, sensor, "air_c", ts, value), f"yr/{zone}/{sensor}/air")
        for ts, zone, sensor, value in air_week(start_ts, zones, seed)
    )
    return sum(feed(cfg, items, "filling").values())


def write_csv(path: Path, start_ts: float, zones: int, seed: int, weeks: int = 1) -> int:
    n = 0
    with path.open("w") as fh:
        fh.write("time,zone,sensor,signal,value\n")
        for w in range(weeks):
            for ts, zone, sensor, value in air_week(start_ts + w * WEEK_S, zones, seed + 1000 * w):
                fh.write(f"{ts:.0f},{zone},{sensor},air_c,{value}\n")
                n += 1
    return n


#: Live ingest is timed over two spans of one run, in minutes from its start: just after the
#: engine's first analysis pass (which reads the zone's last days once), and eight hours on,
#: when the history's due event costs are done and an empty record has grown its own first
#: hours (separate index pages per sensor, detector context).
LIVE_SPANS = ((16, 136), (480, 600))


def live_rates(cfg_path: Path, start_ts: float, zones: int, spans=LIVE_SPANS) -> list[float]:
    """Readings a second through the live path from start_ts on, over each span of minutes of
    one run (the minutes before and between spans are fed, not timed)."""
    cfg = load_config(str(cfg_path))
    store = Store(cfg.storage.path)
    try:
        engine = Engine(cfg, store)
        rng = np.random.default_rng(int(start_ts))
        rates = []
        minute = 0
        for first, last in spans:
            taken = 0.0
            for m in range(minute, last):
                ts = start_ts + 60.0 * m
                values = rng.normal(-25.0, 0.3, zones * PER_ZONE).round(2)
                batch = [
                    Message(f"yr/z{k // PER_ZONE:02d}/s{k % PER_ZONE}/air", json.dumps({"value": v}).encode(), ts, 0, 1)
                    for k, v in enumerate(values.tolist())
                ]
                t = time.perf_counter()
                engine.process(batch, now=ts)
                if m >= first:
                    taken += time.perf_counter() - t
            rates.append((last - first) * zones * PER_ZONE / taken)
            minute = last
        return rates
    finally:
        store.close()


def live_ratio(cfg: Path, start_ts: float, zones: int) -> tuple[list[float], list[float]]:
    """Median live rates (per span) on a copy of this database and on an empty one beside it
    (same run, alternating). The copy keeps the live rows out of the history the next step
    grows (they would collide with its readings)."""
    rates = {}
    for name in ("grown", "empty"):
        (cfg.parent / name).mkdir(exist_ok=True)
        (cfg.parent / name / "year.toml").write_text(config_text(cfg.parent / name, zones))
    for _ in range(3):
        for name in ("grown", "empty"):
            where = cfg.parent / name
            for p in where.glob("year.db*"):
                p.unlink()
            if name == "grown":
                for p in cfg.parent.glob("year.db*"):
                    shutil.copyfile(p, where / p.name)
            rates.setdefault(name, []).append(live_rates(where / "year.toml", start_ts, zones))
    for name in ("grown", "empty"):
        shutil.rmtree(cfg.parent / name)
    big, small = (
        [statistics.median(r[i] for r in rates[n]) for i in range(len(LIVE_SPANS))] for n in ("grown", "empty")
    )
    return big, small


def measured(args: list[str], cwd: Path) -> tuple[float, float, str]:
    """Wall seconds, peak resident MB and stdout of one command in its own process."""
    cmd = ["/usr/bin/time", "-f", "%e %M", sys.executable, "-m", "watcher", *args]
    done = subprocess.run(cmd, cwd=cwd, capture_output=True, text=True)
    last = done.stderr.strip().splitlines()[-1].split()
    if done.returncode != 0:
        raise SystemExit(f"{' '.join(args)} failed ({done.returncode}):\n{done.stdout[-2000:]}\n{done.stderr[-2000:]}")
    return float(last[0]), float(last[1]) / 1024.0, done.stdout


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--sensors", type=int, default=200)
    ap.add_argument("--steps", default="1,4,13", help="weeks of history at which to measure, ascending")
    ap.add_argument("--year", action="store_true", help="also measure at 52 weeks")
    ap.add_argument("--folder", default=None, help="where to build (default: a temporary folder)")
    ap.add_argument(
        "--replay-weeks", type=int, default=1, help="weeks in each step's replayed file (the rest is grown)"
    )
    a = ap.parse_args()
    steps = [int(s) for s in a.steps.split(",")] + ([52] if a.year else [])
    zones = a.sensors // PER_ZONE
    folder = Path(a.folder) if a.folder else Path(tempfile.mkdtemp(prefix="watcher-year-"))
    folder.mkdir(parents=True, exist_ok=True)
    cfg = folder / "year.toml"
    cfg.write_text(config_text(folder, zones))
    print(f"site: {zones} zones x {PER_ZONE} sensors, one reading a minute ({a.sensors * 10080:,} a week); {folder}")
    header = (
        f"{'weeks':>5} {'rows':>12} {'B/row':>6} {'replay s':>8} {'MB':>6} {'report s':>8} {'MB':>6} "
        f"{'verify s':>8} {'rows/s':>9} {'since s':>7} {'marked s':>8} {'status s':>8} "
        f"{'live/s':>7} {'empty/s':>7} {'8h live':>7} {'8h empty':>8}"
    )
    print(header)
    weeks_done = 0
    for step in steps:
        replayed = min(a.replay_weeks, step - weeks_done)
        for w in range(weeks_done, step - replayed):
            fill_week(load_config(str(cfg)), T0 + w * WEEK_S, zones, seed=w)
        csv = folder / f"week{step}.csv"
        write_csv(csv, T0 + (step - replayed) * WEEK_S, zones, seed=step, weeks=replayed)
        last_start = T0 + (step - 1) * WEEK_S
        replay_s, replay_mb, _ = measured(["replay", "--config", str(cfg), str(csv)], folder)
        csv.unlink()
        weeks_done = step
        y, wk, _ = dt.datetime.fromtimestamp(last_start + 86400.0, tz=dt.UTC).isocalendar()
        report_s, report_mb, _ = measured(
            ["report", "--config", str(cfg), "--week", f"{y}-W{wk:02d}"],
            folder,  # the schedule's formats
        )
        since = dt.datetime.fromtimestamp(last_start, tz=dt.UTC).strftime("%Y-%m-%d")
        since_s, _, _ = measured(["verify", "--config", str(cfg), "--since", since], folder)
        verify_s, _, out = measured(["verify", "--config", str(cfg)], folder)
        marked_s, _, _ = measured(["verify", "--config", str(cfg), "--since", since], folder)
        status_s, _, _ = measured(["status", "--config", str(cfg)], folder)
        rows = a.sensors * 10080 * step
        size = sum(p.stat().st_size for p in folder.glob("year.db*"))
        live, empty = live_ratio(cfg, T0 + step * WEEK_S, zones)
        print(
            f"{step:5d} {rows:12,d} {size / rows:6.0f} {replay_s:8.1f} {replay_mb:6.0f} {report_s:8.1f} "
            f"{report_mb:6.0f} {verify_s:8.1f} {rows / verify_s:9,.0f} {since_s:7.1f} {marked_s:8.1f} {status_s:8.1f} "
            f"{live[0]:7,.0f} {empty[0]:7,.0f} {live[1]:7,.0f} {empty[1]:8,.0f}  "
            f"(live ingest ratio {live[0] / empty[0]:.2f}; eight hours on {live[1] / empty[1]:.2f})",
            flush=True,
        )


if __name__ == "__main__":
    main()
