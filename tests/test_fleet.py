"""A fleet end to end, with the shipped files of deploy/fleet/: two sites, each with its own
mosquitto and watcher, bridged over a WAN link (a TCP proxy the test cuts) to a central
mosquitto read by a central watcher. Real brokers, real watcher processes, real TLS with
client certificates on the bridges; the central watcher's record on a real PostgreSQL, read
through a read-only role by status, verify and the page."""

from __future__ import annotations

import html
import json
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import paho.mqtt.client as mqtt

from tests.broker import MOSQUITTO, MOSQUITTO_PASSWD, Broker, free_port, make_ca, wait_listening
from tests.proxy import Proxy
from tests.service_harness import Publisher, WatcherProcess, messages, wait_for, write_config, write_secret
from watcher.errors import StoreError
from watcher.store.db import Store

FLEET = Path(__file__).resolve().parent.parent / "deploy" / "fleet"
SITES = {"kestrel": ("bulk-a", "dispatch"), "harbour": ("store-1",)}
CENTRAL_PASSWORD = "central-pw-for-tests"


def adapted(text: str, changes) -> str:
    """A shipped file with its paths, hosts and ports made local; each change must apply (the
    shipped file still says what the test relies on)."""
    for old, new in changes:
        assert old in text, old
        text = text.replace(old, new)
    return text


def start_central_broker(folder: Path, certs: dict) -> tuple[subprocess.Popen, int, int]:
    bridge_port, watcher_port = free_port(), free_port()
    conf = adapted(
        (FLEET / "central-mosquitto.conf").read_text(),
        [
            ("listener 8883", f"listener {bridge_port} 127.0.0.1"),
            ("listener 8884", f"listener {watcher_port} 127.0.0.1"),
            ("/var/lib/mosquitto/", f"{folder}/"),
            ("/etc/mosquitto/certs/fleet-ca.pem", str(certs["ca"])),
            ("/etc/mosquitto/certs/central.pem", str(certs["server_cert"])),
            ("/etc/mosquitto/certs/central.key", str(certs["server_key"])),
            ("/etc/mosquitto/fleet.acl", str(folder / "fleet.acl")),
            ("/etc/mosquitto/fleet.passwd", str(folder / "passwd")),
        ],
    )
    (folder / "mosquitto.conf").write_text(f"user root\nlog_dest file {folder / 'mosquitto.log'}\n" + conf)
    (folder / "fleet.acl").write_text((FLEET / "fleet.acl").read_text())
    subprocess.run(
        [MOSQUITTO_PASSWD, "-c", "-b", str(folder / "passwd"), "central-watcher", CENTRAL_PASSWORD], check=True
    )
    proc = subprocess.Popen([MOSQUITTO, "-c", str(folder / "mosquitto.conf")], stderr=subprocess.PIPE)
    wait_listening(proc, watcher_port, lambda: (folder / "mosquitto.log").read_text()[-2000:])
    return proc, bridge_port, watcher_port


def site_broker(folder: Path, site: str, certs: dict, wan_port: int) -> Broker:
    """The test broker of a site, with the shipped bridge appended (through the WAN proxy)."""
    broker = Broker(folder)
    bridge = adapted(
        (FLEET / "site-bridge.conf").read_text(),
        [
            ("address central.fleet.example:8883", f"address 127.0.0.1:{wan_port}"),
            ("remote_clientid bridge-kestrel", f"remote_clientid bridge-{site}"),
            ("restart_timeout 2 30", "restart_timeout 1 2"),
            ("keepalive_interval 30", "keepalive_interval 2"),
            ("fleet/kestrel/bridge/state", f"fleet/{site}/bridge/state"),
            ("/etc/mosquitto/certs/fleet-ca.pem", str(certs["ca"])),
            ("/etc/mosquitto/certs/bridge-kestrel.pem", str(certs[f"{site}_cert"])),
            ("/etc/mosquitto/certs/bridge-kestrel.key", str(certs[f"{site}_key"])),
            ("topic # out 1 kestrel/ fleet/kestrel/", f"topic # out 1 {site}/ fleet/{site}/"),
        ],
    )
    broker.conf.write_text(broker.conf.read_text() + "\n" + bridge)
    return broker


def central_config(folder: Path, certs: dict, port: int, record: tuple[str, str], reader: tuple[str, Path]) -> Path:
    """The shipped central configuration on this test's brokers and PostgreSQL record (record:
    the writer's URL and password; reader: the read-only role's URL and password file)."""
    write_secret(folder / "pw", CENTRAL_PASSWORD + "\n")
    write_secret(folder / "pg-pw", record[1] + "\n")
    write_secret(folder / "qa.url", f"json://127.0.0.1:{free_port()}/\n")
    text = adapted(
        (FLEET / "central-watcher.toml").read_text(),
        [
            ('host = "central.fleet.example"', 'host = "localhost"'),
            ("port = 8884 ", f"port = {port} "),
            ('password_credential = "broker-password"', f'password_file = "{folder / "pw"}"'),
            ("/etc/watcher/fleet-ca.pem", str(certs["ca"])),
            ("/var/lib/watcher/central.db", str(folder / "central.db")),
            ("postgresql://watcher@db.fleet.example:5432/central", record[0]),
            ('password_credential = "pg-password"', f'password_file = "{folder / "pg-pw"}"'),
            ("postgresql://watcher_reader@db.fleet.example:5432/central", reader[0]),
            ('reader_password_credential = "pg-reader-password"', f'reader_password_file = "{reader[1]}"'),
            ("enabled = true ", "enabled = false "),
            ('url_credential = "qa-team"', f'url_file = "{folder / "qa.url"}"'),
            # The test's sensors send epoch seconds in "temp_c" (the harness's payloads).
            ('value = "temp"\ntime = "ts"', 'value = "temp_c"\ntime = "ts"\ntime_format = "epoch_s"'),
        ],
    )
    text += f"\n[health]\nport = {free_port()}\n"
    path = folder / "central.toml"
    path.write_text(text)
    return path


def opened(record) -> Store:
    """A reader's handle on a record: a SQLite file, or a PostgreSQL (url, password)."""
    if isinstance(record, tuple):
        return Store(record[0], readonly=True, password=record[1])
    return Store(str(record), readonly=True)


def counts(record) -> dict[str, int]:
    """Readings per zone in a record (a SQLite file, or a PostgreSQL (url, password)); none yet: {}."""
    try:
        store = opened(record)
    except StoreError:  # not made yet
        return {}
    try:
        return dict(store.conn.execute("SELECT zone, count(*) FROM readings GROUP BY zone").fetchall())
    finally:
        store.close()


def rows(record, rename=lambda z: z) -> set[tuple]:
    store = opened(record)
    try:
        return {
            (rename(z), s, t, v) for z, s, t, v in store.conn.execute("SELECT zone, sensor, ts, value FROM readings")
        }
    finally:
        store.close()


def bridge_states(port: int, certs: dict) -> dict[str, bytes]:
    """The bridges' retained state messages at the centre, as the central watcher's user reads them."""
    got: dict[str, bytes] = {}
    c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="t-fleet-view", protocol=mqtt.MQTTv311)
    c.username_pw_set("central-watcher", CENTRAL_PASSWORD)
    c.tls_set(ca_certs=str(certs["ca"]))
    c.on_message = lambda client, userdata, m: got.__setitem__(m.topic.split("/")[1], m.payload)
    c.connect("localhost", port)
    c.subscribe("fleet/+/bridge/state", qos=1)
    c.loop_start()
    try:
        wait_for(lambda: len(got) == len(SITES), 10, "the bridges' states")
    finally:
        c.loop_stop()
        c.disconnect()
    return got


def verify(config: Path) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "watcher", "verify", "--config", str(config)], capture_output=True, text=True
    )


def test_two_sites_reach_the_central_record_once_through_a_cut_wan(tmp_path, pg_server, pg_record):
    """Readings published at two sites are stored by each site's watcher and, bridged, once by
    the central watcher under the site's zone names ("kestrel-bulk-a"), with kestrel's WAN link
    stalled mid-stream (half-open: the bridge must notice and reconnect) and then restored:
    while cut, the site keeps recording and the centre gets harbour's readings only; after,
    the queued readings arrive. Then the central watcher is killed (SIGKILL) while both sites
    go on, and restarted. Nothing lost, nothing doubled, and `verify` passes on all three
    records."""
    certs = make_ca(tmp_path, clients=tuple(SITES))
    (tmp_path / "central").mkdir()
    central_proc, bridge_port, watcher_port = start_central_broker(tmp_path / "central", certs)
    wan = {site: Proxy(bridge_port) for site in SITES}
    brokers, watchers, configs, publishers = {}, {}, {}, {}
    try:
        for site, zones in SITES.items():
            folder = tmp_path / site
            folder.mkdir()
            brokers[site] = site_broker(folder, site, certs, wan[site].port)
            brokers[site].start()
            configs[site] = write_config(folder, brokers[site], zones=zones, site=site)
            watchers[site] = WatcherProcess(configs[site])
        central_db = (pg_record[0], pg_record[1])  # the central record, on PostgreSQL
        database = pg_record[0].rsplit("/", 1)[1]
        reader = pg_server.add_reader(database, "fleet_reader")
        configs["central"] = central_config(tmp_path / "central", certs, watcher_port, pg_record, reader)
        watchers["central"] = WatcherProcess(configs["central"])
        for w in watchers.values():
            w.wait_ready()
        for site, zones in SITES.items():
            publishers[site] = Publisher(brokers[site], client_id=f"sensors-{site}")
            publishers[site].send(messages(zones, 0, 30, site=site))
        wait_for(lambda: sum(counts(central_db).values()) == 90, 60, "the first half at the centre")

        wan["kestrel"].stall()  # the WAN link hangs: sockets open, nothing moves
        for site, zones in SITES.items():
            publishers[site].send(messages(zones, 30, 30, site=site))
        wait_for(lambda: counts(central_db).get("harbour-store-1") == 60, 60, "harbour's second half")
        wait_for(lambda: sum(counts(tmp_path / "kestrel" / "watcher.db").values()) == 120, 60, "kestrel's own record")
        time.sleep(3)
        assert counts(central_db).get("kestrel-bulk-a") == 30  # nothing crosses a cut link

        wan["kestrel"].resume()
        wait_for(lambda: sum(counts(central_db).values()) == 180, 90, "kestrel's queued readings at the centre")
        time.sleep(3)  # a late duplicate would land now
        assert counts(central_db) == {"kestrel-bulk-a": 60, "kestrel-dispatch": 60, "harbour-store-1": 60}
        site_rows = set()
        for site in SITES:
            site_rows |= rows(tmp_path / site / "watcher.db", lambda z, site=site: f"{site}-{z}")
        assert rows(central_db) == site_rows
        assert wan["kestrel"].accepted >= 2  # the bridge reconnected through the restored link
        assert bridge_states(watcher_port, certs) == {"kestrel": b"1", "harbour": b"1"}
        fleet_page(watchers["central"])

        # The central watcher dies (SIGKILL) while the sites go on: its session at the central
        # broker keeps what it had not acknowledged and what arrives meanwhile.
        watchers["central"].kill()
        for site, zones in SITES.items():
            publishers[site].send(messages(zones, 60, 30, site=site))
        wait_for(
            lambda: sum(counts(tmp_path / "kestrel" / "watcher.db").values()) == 180, 60, "kestrel's third half hour"
        )
        watchers["central"] = WatcherProcess(configs["central"])
        watchers["central"].wait_ready()
        wait_for(lambda: sum(counts(central_db).values()) == 270, 90, "the readings sent while the centre was down")
        time.sleep(3)
        assert counts(central_db) == {"kestrel-bulk-a": 90, "kestrel-dispatch": 90, "harbour-store-1": 90}
        site_rows = set()
        for site in SITES:
            site_rows |= rows(tmp_path / site / "watcher.db", lambda z, site=site: f"{site}-{z}")
        assert rows(central_db) == site_rows
    finally:
        for name, w in watchers.items():
            if w.proc.poll() is None:
                assert w.stop() == 0, name
        for p in publishers.values():
            p.close()
        for b in brokers.values():
            b.stop()
        for proxy in wan.values():
            proxy.close()
        central_proc.terminate()
        central_proc.wait(10)
        central_proc.stderr.close()
    for name, config in configs.items():
        done = verify(config)
        assert done.returncode == 0, (name, done.stdout[-2000:], done.stderr[-2000:])
    fleet_view(configs["central"])


def fleet_page(central: WatcherProcess) -> None:
    """The central watcher's page at / lists every site (a line each) and every zone with its site."""
    with urllib.request.urlopen(central.url("/"), timeout=60) as r:  # the first render draws every chart
        page = r.read().decode()
    assert "<h1>2 sites: the site now</h1>" in page and "<h2>Sites</h2>" in page
    sites = page[page.index("<h2>Sites</h2>") : page.index("<h2>Zones</h2>")]
    for name in ("Kestrel Point Frozen Distribution, Unit 4", "Harbour Row Cold Store"):
        assert html.escape(name) in sites
    zones = page[page.index("<h2>Zones</h2>") :]
    for zone in ("Kestrel Point: bulk store A", "Kestrel Point: dispatch freezer", "Harbour Row: store 1"):
        assert html.escape(zone) in zones


def fleet_view(config: Path) -> None:
    """`watcher status --all-sites` on the central record: a line a site (its zones and their
    readings), then each site's zones under its name."""
    done = subprocess.run(
        [sys.executable, "-m", "watcher", "status", "--all-sites", "--config", str(config)],
        capture_output=True,
        text=True,
    )
    assert done.returncode == 0, done.stderr
    out = done.stdout
    lines = {
        line.split()[0]: line.split() for line in out.splitlines() if line.split()[:1] in (["kestrel"], ["harbour"])
    }
    assert lines["kestrel"][1:3] == ["2", "0"] and lines["harbour"][1:3] == ["1", "0"]  # zones, open alerts
    kestrel = out.index("Kestrel Point Frozen Distribution, Unit 4 (kestrel)")
    harbour = out.index("Harbour Row Cold Store (harbour)")
    assert (
        kestrel < out.index("kestrel-bulk-a") < out.index("kestrel-dispatch") < harbour < out.index("harbour-store-1")
    )
    for zone in ("kestrel-bulk-a", "kestrel-dispatch", "harbour-store-1"):
        (row,) = [line.split() for line in out.splitlines() if line.startswith(zone)]
        assert "90" in row, row  # its readings, all of them


def shared_record_config(folder: Path, broker: Broker, site: str, zones, record: tuple[str, str]) -> Path:
    """A central watcher's configuration for one site's share of the fleet, on the shared
    PostgreSQL record."""
    folder.mkdir()
    path = write_config(folder, broker, zones=zones, site=site)
    write_secret(folder / "pg-pw", record[1] + "\n")
    text = path.read_text().replace(
        "[storage]\n", f'[storage]\nurl = "{record[0]}"\npassword_file = "{folder / "pg-pw"}"\n', 1
    )
    path.write_text(text.replace(f'client_id = "watcher-test-{folder.name[-12:]}"', f'client_id = "central-{site}"'))
    return path


def test_two_central_watchers_share_one_postgresql_record(tmp_path, pg_record, broker):
    """Two central watchers split the sites (each subscribes to its own sites' topics) and keep
    one PostgreSQL record between them: every reading of both sites is there once, one of them
    killed (SIGKILL) and restarted mid-stream loses nothing, the shared logs' chains stay whole
    (`verify` from either passes), and a view of every site reads both watchers' zones."""
    shares = {"kestrel": ("bulk-a", "dispatch"), "harbour": ("store-1",)}
    configs = {
        site: shared_record_config(tmp_path / site, broker, site, zones, pg_record) for site, zones in shares.items()
    }
    watchers = {site: WatcherProcess(config) for site, config in configs.items()}
    publisher = Publisher(broker)
    try:
        for w in watchers.values():
            w.wait_ready()
        for site, zones in shares.items():
            publisher.send(messages(zones, 0, 30, site=site))
        wait_for(lambda: sum(counts(pg_record).values()) == 90, 60, "both sites' first half hour")
        watchers["kestrel"].kill()
        for site, zones in shares.items():
            publisher.send(messages(zones, 30, 30, site=site))
        wait_for(lambda: counts(pg_record).get("store-1") == 60, 60, "harbour's second half hour")
        watchers["kestrel"] = WatcherProcess(configs["kestrel"])
        watchers["kestrel"].wait_ready()
        wait_for(lambda: sum(counts(pg_record).values()) == 180, 90, "kestrel's readings kept for it by the broker")
        time.sleep(2)
        assert counts(pg_record) == {"bulk-a": 60, "dispatch": 60, "store-1": 60}
    finally:
        publisher.close()
        for site, w in watchers.items():
            if w.proc.poll() is None:
                assert w.stop() == 0, site
    for config in configs.values():
        done = verify(config)
        assert done.returncode == 0 and "Record intact" in done.stdout, (done.stdout[-2000:], done.stderr[-2000:])
    view = tmp_path / "view.toml"
    kestrel = configs["kestrel"].read_text().replace('[[zones]]\nid = "', '[[zones]]\nsite = "kestrel"\nid = "')
    harbour_zone = '\n[[zones]]\nid = "store-1"\nsite = "harbour"\nsetpoint_c = -25.0\n'
    view.write_text(
        kestrel.replace(
            "[[sources]]", f'[[sites]]\nid = "harbour"\nname = "Harbour Row"\n{harbour_zone}\n[[sources]]', 1
        )
    )
    done = subprocess.run(
        [sys.executable, "-m", "watcher", "status", "--all-sites", "--json", "--config", str(view)],
        capture_output=True,
        text=True,
    )
    assert done.returncode == 0, done.stderr
    zones = {z["id"]: z["readings_total"] for z in json.loads(done.stdout)["zones"]}
    assert zones == {"bulk-a": 60, "dispatch": 60, "store-1": 60}
