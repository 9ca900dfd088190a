"""A gateway's buffered backlog against the same readings live: mosquitto + `watcher run` + a
real SMTP server.

Six hours of one zone (tests/test_monitor.outage_minutes: a 2.5 h refrigeration fault, a door
held open 12 minutes) are published twice: to a watcher that is running, a minute of data at
a time, and to a watcher that is down, so they wait in its persistent session at the broker
and arrive in a batch or two when it starts. Both must raise the same alerts with the same
data times (within the 60 s judging step), and the backlog must tell each alert once, marked
as already over, with both times.
"""

import json
import sqlite3
import time

from tests.receivers import SmtpReceiver
from tests.service_harness import (
    T0,
    TIMED_DOOR_SOURCE_TOML,
    Publisher,
    WatcherProcess,
    channel_toml,
    wait_for,
    write_config,
)
from tests.test_monitor import outage_minutes
from watcher.alerts.policy import default_rules

KEEP = ("air-benchmark", "product-benchmark", "door-open")
ZONE = "dispatch"


def config(folder, broker, mail_url: str):
    folder.mkdir()
    off = ", ".join(f'"{r.id}"' for r in default_rules() if r.id not in KEEP)
    extra = f"""
[alerts]
disable = [{off}]
{channel_toml(folder, "qa-mail", mail_url)}
{TIMED_DOOR_SOURCE_TOML}"""
    return write_config(folder, broker, zones=(ZONE,), extra=extra)


def messages() -> list[list[tuple[str, bytes]]]:
    """The readings, one list per data minute."""
    by_minute: dict[int, list] = {}
    for k, kind, value in outage_minutes():
        ts = T0 + 60 * k
        if kind == "door":
            item = (f"kp/{ZONE}/d1/door", json.dumps({"open": int(value), "ts": ts}).encode())
        else:
            item = (f"kp/{ZONE}/s1/air", json.dumps({"temp_c": value, "ts": ts}).encode())
        by_minute.setdefault(k, []).append(item)
    return [by_minute[k] for k in sorted(by_minute)]


def stored(db) -> tuple[int, dict]:
    with sqlite3.connect(db) as c:
        n = c.execute("SELECT count(*) FROM readings").fetchone()[0]
        alerts = {r[0]: r[1:] for r in c.execute("SELECT rule, since_ts, raised_ts, cleared_ts FROM alerts")}
    return n, alerts


def all_cleared(db, total: int) -> bool:
    n, alerts = stored(db)
    return n == total and set(alerts) == set(KEEP) and all(a[2] is not None for a in alerts.values())


def test_a_buffered_backlog_raises_what_live_readings_raise(tmp_path, broker):
    """The outage scenario through a real broker: live and queued-while-down give the same alerts."""
    minutes = messages()
    total = sum(len(m) for m in minutes)
    live_mail, late_mail = SmtpReceiver(), SmtpReceiver()
    live_cfg = config(tmp_path / "live", broker, live_mail.url())
    late_cfg = config(tmp_path / "late", broker, late_mail.url())
    pub = Publisher(broker)
    procs = []
    try:
        live = WatcherProcess(live_cfg)
        procs.append(live)
        live.wait_ready()
        for batch in minutes:
            pub.send(batch)
            time.sleep(0.03)
        wait_for(lambda: all_cleared(tmp_path / "live/watcher.db", total), timeout=60, what="the live alerts")
        cleared = lambda: sum("back to normal" in s for s in live_mail.subjects())  # noqa: E731
        wait_for(lambda: cleared() >= 3, timeout=30, what="the live clear notices")
        assert live.stop() == 0

        late = WatcherProcess(late_cfg)  # once, to open its persistent session; then down
        procs.append(late)
        late.wait_ready()
        assert late.stop() == 0
        pub.send([item for batch in minutes for item in batch])  # queued at the broker for it
        late = WatcherProcess(late_cfg)
        procs.append(late)
        late.wait_ready()
        wait_for(lambda: all_cleared(tmp_path / "late/watcher.db", total), timeout=60, what="the backlog's alerts")
        wait_for(lambda: len(late_mail.subjects()) >= 3, timeout=30, what="the backlog's mails")
        time.sleep(1.0)  # nothing more may follow
        assert late.stop() == 0

        _, want = stored(tmp_path / "live/watcher.db")
        _, got = stored(tmp_path / "late/watcher.db")
        for rule in KEEP:
            for a, b in zip(want[rule], got[rule]):
                assert abs(a - b) <= 60.0, (rule, want[rule], got[rule])
        assert want["door-open"][:2] == (T0 + 30 * 60, T0 + 40 * 60)  # the door shorter than the batch

        subjects, texts = late_mail.subjects(), late_mail.texts()
        assert len(subjects) == 3 and all("already over" in s for s in subjects), subjects
        assert all("Learnt late" in t and "from 2026-11-18" in t for t in texts)
        assert not any("already over" in s for s in live_mail.subjects())
        assert cleared() == 3
    finally:
        pub.close()
        for p in procs:
            if p.proc.poll() is None:
                p.kill()
        live_mail.close()
        late_mail.close()
