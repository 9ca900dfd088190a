"""How long an alert takes from the reading that crosses a rule to the e-mail in the inbox:
mosquitto, `watcher run` and a real SMTP server on loopback, the door rule (10 min open, data
time). The reference, measured in the same run, is one e-mail sent straight through apprise to
the same server: the floor that any alert pays. Prints each run, the median and the ratio.
Usage: python bench/alert_latency.py [--runs 5]
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from tests.broker import Broker  # noqa: E402
from tests.receivers import Receiver, SmtpReceiver  # noqa: E402
from tests.service_harness import Publisher, WatcherProcess, wait_for  # noqa: E402
from tests.test_alerts_e2e import alert_config, count, minute, play  # noqa: E402


def one_run() -> tuple[float, float]:
    """(alert latency s, direct apprise mail s) in one fresh set-up."""
    import apprise

    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        broker = Broker(folder)
        broker.start()
        smtp, hook = SmtpReceiver(), Receiver()
        w = WatcherProcess(alert_config(folder, broker, smtp.url(), hook.url()))
        pub = Publisher(broker)
        try:
            w.wait_ready()
            play(pub, 0, 59)
            wait_for(lambda: count(smtp.subjects(), "air temperature") >= 1, timeout=30, what="the air alert")
            pub.send(minute(60))  # the door has now been open 10 min
            sent = time.monotonic()
            wait_for(lambda: count(smtp.subjects(), "door open") >= 1, timeout=30, what="the door alert")
            alert_s = next(t for t, s in zip(smtp.times, smtp.subjects()) if "door open" in s) - sent
            before = len(smtp.subjects())
            direct = apprise.Apprise()
            direct.add(smtp.url())
            t0 = time.monotonic()
            direct.notify(title="reference", body="one mail straight through apprise")
            wait_for(lambda: len(smtp.subjects()) > before, timeout=30, what="the reference mail")
            return alert_s, smtp.times[-1] - t0
        finally:
            pub.close()
            w.kill()
            smtp.close()
            hook.close()
            broker.stop()


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=5)
    args = ap.parse_args()
    alert, ref = [], []
    for k in range(args.runs):
        a, r = one_run()
        alert.append(a)
        ref.append(r)
        print(f"run {k + 1}: reading to alert mail {a:.3f} s; direct mail {r:.3f} s")
    a, r = statistics.median(alert), statistics.median(ref)
    print(f"median: reading to alert mail {a:.3f} s (max {max(alert):.3f} s); direct mail {r:.3f} s; ratio {a / r:.1f}")


if __name__ == "__main__":
    main()
