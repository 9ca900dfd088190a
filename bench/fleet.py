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

With --engines sqlite,postgresql each S runs on both engines in the same run, the central
record on a SQLite file and on a PostgreSQL server this script starts on loopback in a
temporary folder (tests/pgserver.py: synchronous commit, fsync on, the same disk), and the
ratio of their ingest rates is printed. Then a full `verify` of each record is timed (rows
checked a second; on SQLite the walk splits over worker processes once a record is big). The watcher's own work (the model, the chain's
hashing) runs in this process in both cases; PostgreSQL's runs in its server's processes.

Usage: python bench/fleet.py [--sites 1,10,40] [--sensors 200] [--minutes 30] [--engines sqlite,postgresql]
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


def minute_cost(sites: int, sensors: int, minutes: int, pg=None) -> tuple[float, float, float]:
    """(readings a second, seconds of work a minute of data, rows a second a full verify then
    checks) for S sites on an empty record (on the PostgreSQL server pg, when given)."""
    folder = Path(tempfile.mkdtemp(prefix="watcher-fleet-"))
    cfg = load_config(str(central_config(folder, sites, sensors)))
    if pg is None:
        store = Store(cfg.storage.path)
    else:
        store = Store(pg.new_database(f"bench_{sites}_{int(time.time() * 1000)}"), password=pg.password)
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
        t = time.perf_counter()
        findings, counts = store.record.verify()
        verify_rate = sum(counts.values()) / (time.perf_counter() - t)
        assert not findings, findings
        return minutes * len(names) / taken, taken / minutes, verify_rate
    finally:
        store.close()


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--sites", default="1,10,40", help="site counts to measure, ascending")
    ap.add_argument("--sensors", type=int, default=200, help="air sensors a site (ten a zone)")
    ap.add_argument("--minutes", type=int, default=30, help="minutes of data timed at each site count")
    ap.add_argument("--engines", default="sqlite", help="sqlite, postgresql or both (comma-separated)")
    a = ap.parse_args()
    engines = [e.strip() for e in a.engines.split(",")]
    pg = None
    if "postgresql" in engines:
        from tests.pgserver import PostgresServer

        pg = PostgresServer()
        pg.start()
    try:
        run(a, engines, pg)
    finally:
        if pg is not None:
            pg.stop()


def run(a, engines: list[str], pg) -> None:
    print(f"central watcher, {a.sensors} sensors a site at one reading a minute; {a.minutes} minutes timed")
    print(
        f"{'engine':<10} {'sites':>5} {'zones':>6} {'readings/s':>10} {'s per data minute':>18} {'one core':>9} "
        f"{'per site':>9} {'verify rows/s':>14}"
    )
    per_site: dict[str, float] = {}
    for sites in [int(s) for s in a.sites.split(",")]:
        rates = {}
        for engine in engines:
            rate, cost, verify_rate = minute_cost(sites, a.sensors, a.minutes, pg if engine == "postgresql" else None)
            rates[engine], per_site[engine] = rate, cost / sites
            print(
                f"{engine:<10} {sites:5d} {sites * a.sensors // PER_ZONE:6d} {rate:10,.0f} {cost:18.2f} "
                f"{cost / 60:9.1%} {per_site[engine] * 1000:7.1f} ms {verify_rate:14,.0f}",
                flush=True,
            )
        if len(rates) == 2:
            print(f"{'':<10} {sites:5d} PostgreSQL / SQLite ingest rate: {rates['postgresql'] / rates['sqlite']:.2f}")
    for engine, cost in per_site.items():
        print(
            f"{engine}: sites carried by one core at the largest count: about {60.0 / cost:,.0f} (60 s / a site's minute)"
        )


if __name__ == "__main__":
    main()
