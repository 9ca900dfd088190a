"""How many sites one central watcher carries (docs/fleet.md): the engine's cost of a minute of
data from S sites of --sensors air sensors each (ten a zone, one reading a minute), through a
central configuration of S sites whose zones are named by the zone template
(fleet/{site}/{zone}/{sensor}/air, zone "{site}-{zone}").

For each S the engine (parse, store with the chain, commit with synchronous=FULL, feed the
model, alerts, event analysis every 15 minutes of data) takes --minutes of minute batches on
an empty central record, after a warm-up of 16 minutes (the first analysis pass); it prints
readings a second, the seconds of work a minute of data costs, and the share of one core that
is. Sites carried = 60 s over the cost of one site's minute, from the largest S (the cost is
checked to grow linearly). The MQTT edge runs in its own process on the other core
(bench/service_ingest.py measures it) and is left out; so is the WAN.

Usage: python bench/fleet.py [--sites 1,10,40] [--sensors 200] [--minutes 30]
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from watcher.config import load_config  # noqa: E402
from watcher.engine.batch import Engine, Message  # noqa: E402
from watcher.store.db import Store  # noqa: E402

PER_ZONE = 10
WARM_MINUTES = 16
T0 = 1_793_577_600.0  # Monday 2026-11-02 00:00 UTC


def central_config(folder: Path, sites: int, sensors: int) -> Path:
    (folder / "pw").write_text("x\n")
    (folder / "pw").chmod(0o600)
    zones = sensors // PER_ZONE
    blocks = "".join(
        f'[[sites]]\nid = "s{s:02d}"\n'
        + "".join(f'[[zones]]\nid = "s{s:02d}-z{z:02d}"\nsite = "s{s:02d}"\nsetpoint_c = -25.0\n' for z in range(zones))
        for s in range(sites)
    )
    path = folder / "central.toml"
    path.write_text(
        f"""[broker]
password_file = "{folder / "pw"}"
[storage]
path = "{folder / "central.db"}"
[reports]
enabled = false
dir = "{folder / "reports"}"
{blocks}
[[sources]]
pattern = "fleet/{{site}}/{{zone}}/{{sensor}}/air"
zone = "{{site}}-{{zone}}"
signal = "air_c"
"""
    )
    return path


def minute_cost(sites: int, sensors: int, minutes: int) -> tuple[float, float]:
    """(readings a second, seconds of work a minute of data) for S sites on an empty record."""
    folder = Path(tempfile.mkdtemp(prefix="watcher-fleet-"))
    cfg = load_config(str(central_config(folder, sites, sensors)))
    store = Store(cfg.storage.path)
    try:
        engine = Engine(cfg, store)
        rng = np.random.default_rng(sites)
        names = [
            f"fleet/s{s:02d}/z{k // PER_ZONE:02d}/s{k % PER_ZONE}/air" for s in range(sites) for k in range(sensors)
        ]
        taken = 0.0
        for m in range(WARM_MINUTES + minutes):
            ts = T0 + 60.0 * m
            values = rng.normal(-25.0, 0.3, len(names)).round(2).tolist()
            batch = [Message(n, json.dumps({"value": v}).encode(), ts, 0, 1) for n, v in zip(names, values)]
            t = time.perf_counter()
            engine.process(batch, now=ts)
            if m >= WARM_MINUTES:
                taken += time.perf_counter() - t
        return minutes * len(names) / taken, taken / minutes
    finally:
        store.close()


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--sites", default="1,10,40", help="site counts to measure, ascending")
    ap.add_argument("--sensors", type=int, default=200, help="air sensors a site (ten a zone)")
    ap.add_argument("--minutes", type=int, default=30, help="minutes of data timed at each site count")
    a = ap.parse_args()
    print(f"central watcher on SQLite, {a.sensors} sensors a site at one reading a minute; {a.minutes} minutes timed")
    print(f"{'sites':>5} {'zones':>6} {'readings/s':>10} {'s per data minute':>18} {'one core':>9} {'per site':>9}")
    per_site = None
    for sites in [int(s) for s in a.sites.split(",")]:
        rate, cost = minute_cost(sites, a.sensors, a.minutes)
        per_site = cost / sites
        print(
            f"{sites:5d} {sites * a.sensors // PER_ZONE:6d} {rate:10,.0f} {cost:18.2f} {cost / 60:9.1%} {per_site * 1000:7.1f} ms",
            flush=True,
        )
    print(
        f"sites carried by one core at the largest count: about {60.0 / per_site:,.0f} (60 s / cost of a site's minute)"
    )


if __name__ == "__main__":
    main()
