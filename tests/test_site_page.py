"""The site page, served by `watcher run` at / on its HTTP port, rendered in headless Chromium.

Three hours of readings ending now for two zones, through mosquitto into the real service; an
air rule set to fire at once, so an alert is open."""

import json
import sqlite3
import subprocess
import time

from tests.service_harness import (
    AIR_ALERT_AT_ONCE_TOML,
    Publisher,
    WatcherProcess,
    air_value,
    wait_for,
    write_config,
)
from tests.test_report import HEADLESS, chromium

ZONES = ("bulk-a", "dispatch")


def ready(db) -> bool:
    """Every reading stored, an alert open and a model state saved for each zone (the charts start there)."""
    with sqlite3.connect(db) as c:
        n = c.execute("SELECT count(*) FROM readings").fetchone()[0]
        alerts = c.execute("SELECT count(*) FROM alerts WHERE status = 'open'").fetchone()[0]
        zones = {r[0] for r in c.execute("SELECT DISTINCT zone FROM zone_snapshots")}
    return n == 360 and alerts >= 1 and zones == set(ZONES)


def test_the_site_page_shows_every_zone_the_open_alert_and_charts_without_script(tmp_path, broker):
    """/ answers with one self-contained page: every zone named in the table and with its two
    charts (last 24 h, last 7 days) as inline SVG, the open alert, the caution; it refreshes
    itself and has no script. Headless Chromium renders it without console errors."""
    config = write_config(tmp_path, broker, extra=AIR_ALERT_AT_ONCE_TOML, reorder_s=0.0)
    w = WatcherProcess(config)
    pub = Publisher(broker)
    try:
        w.wait_ready()
        first = round(time.time()) - 3 * 3600
        pub.send(
            [
                (f"kp/{z}/s1/air", json.dumps({"temp_c": air_value(i, k), "ts": first + 60 * k}).encode())
                for k in range(180)
                for i, z in enumerate(ZONES)
            ]
        )
        wait_for(lambda: ready(tmp_path / "watcher.db"), timeout=60, what="readings, an open alert and snapshots")
        code, body = w.get("/")
        page = body.decode()
        assert code == 200, page[:500]
        assert page.count("<svg") == 4 and "<script" not in page and "http-equiv='refresh'" in page
        for z in ZONES:
            assert f"<td>{z}</td>" in page and f"id='zone-{z}'" in page
        assert "<th>product profile</th>" in page and page.count("<td>dairy-ice-cream</td>") == len(ZONES)
        assert "Open alerts" in page and "air temperature at or above -30.0 C" in page, page[:3000]
        assert "not a food-safety verdict" in page
        assert w.get("/metrics")[0] == 200 and w.get("/healthz")[0] == 200  # the page took nothing from them

        base = [chromium(), *HEADLESS, f"--user-data-dir={tmp_path / 'profile'}", "--enable-logging=stderr", "--v=0"]
        dom = subprocess.run([*base, "--dump-dom", w.url("/")], capture_output=True, text=True, timeout=120)
        assert dom.returncode == 0, dom.stderr[-2000:]
        assert dom.stdout.count("<svg") == 4 and "Kestrel Point (test): the site now" in dom.stdout
        assert [x for x in dom.stderr.splitlines() if "CONSOLE" in x or "Uncaught" in x] == []
        shot = tmp_path / "site-page.png"
        run = subprocess.run(
            [*base, "--window-size=1100,2000", f"--screenshot={shot}", w.url("/")],
            capture_output=True,
            text=True,
            timeout=120,
        )
        assert run.returncode == 0 and shot.stat().st_size > 20_000, run.stderr[-2000:]
        assert w.stop() == 0
    finally:
        pub.close()
        if w.proc.poll() is None:
            w.kill()
