"""The example site broker in deploy/mosquitto/: a real mosquitto with its ACL and TLS."""

from __future__ import annotations

import re
import subprocess
from pathlib import Path

import paho.mqtt.client as mqtt

from tests.broker import MOSQUITTO, MOSQUITTO_PASSWD, free_port, make_ca, wait_listening
from tests.service_harness import wait_for

DEPLOY = Path(__file__).resolve().parent.parent / "deploy" / "mosquitto"
USERS = {"watcher": "w-pw", "bulk-a": "b-pw", "dispatch": "d-pw", "control-panel": "c-pw", "qa-lead": "q-pw"}


def start_site_broker(tmp: Path):
    certs = make_ca(tmp)
    tls_port, plain_port = free_port(), free_port()
    conf = (DEPLOY / "mosquitto.conf").read_text()
    for old, new in (
        ("/etc/mosquitto/watcher-site.passwd", str(tmp / "passwd")),
        ("/etc/mosquitto/watcher-site.acl", str(tmp / "acl")),
        ("/var/lib/mosquitto/", f"{tmp}/"),
        ("/etc/mosquitto/certs/site-ca.pem", str(certs["ca"])),
        ("/etc/mosquitto/certs/broker.pem", str(certs["server_cert"])),
        ("/etc/mosquitto/certs/broker.key", str(certs["server_key"])),
        ("listener 8883", f"listener {tls_port} 127.0.0.1"),
        ("listener 1883 127.0.0.1", f"listener {plain_port} 127.0.0.1"),
    ):
        assert old in conf, old
        conf = conf.replace(old, new)
    (tmp / "mosquitto.conf").write_text("user root\n" + conf)
    (tmp / "acl").write_text((DEPLOY / "acl").read_text())
    for i, (user, pw) in enumerate(USERS.items()):
        subprocess.run([MOSQUITTO_PASSWD, *(["-c"] if i == 0 else []), "-b", str(tmp / "passwd"), user, pw], check=True)
    proc = subprocess.Popen([MOSQUITTO, "-c", str(tmp / "mosquitto.conf")], stderr=subprocess.PIPE)
    wait_listening(proc, plain_port)
    return proc, plain_port, tls_port, certs


def client(user: str, port: int, certs=None) -> mqtt.Client:
    c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"t-{user}", protocol=mqtt.MQTTv5)
    c.username_pw_set(user, USERS[user])
    if certs:
        c.tls_set(ca_certs=str(certs["ca"]))
    c.connect("localhost" if certs else "127.0.0.1", port)
    c.loop_start()
    return c


def test_acl_lets_each_sensor_write_only_its_zone_and_operators_acknowledge(tmp_path):
    """The shipped ACL on a real mosquitto: each sensor writes only its zone, only operators acknowledge, on their own topic."""
    proc, port, tls_port, certs = start_site_broker(tmp_path)
    got: list[str] = []
    try:
        w = client("watcher", port)
        w.on_message = lambda c, u, m: got.append(m.topic)
        granted: list[int] = []
        w.on_subscribe = lambda c, u, mid, codes, props: granted.append(mid)
        w.subscribe([("kestrel/#", 1), ("watcher/ack", 1), ("watcher/ack/+", 1)])
        wait_for(lambda: granted, timeout=5, what="the subscription to be granted")
        bulk = client("bulk-a", tls_port, certs)  # a sensor gateway over TLS, verified against the site CA
        bulk.publish("kestrel/bulk-a/s1/air", b'{"temp": -25}', qos=1).wait_for_publish(5)
        bulk.publish("kestrel/dispatch/s1/air", b'{"temp": -25}', qos=1).wait_for_publish(5)  # not its zone
        bulk.publish("watcher/ack", b'{"alert": 1, "by": "a sensor"}', qos=1).wait_for_publish(5)
        bulk.publish("watcher/ack/bulk-a", b'{"alert": 1, "by": "a sensor"}', qos=1).wait_for_publish(5)
        panel = client("control-panel", port)
        panel.publish("watcher/ack", b'{"alert": 1, "by": "Dana"}', qos=1).wait_for_publish(5)  # no identity: refused
        panel.publish("watcher/ack/control-panel", b'{"alert": 1, "by": "Dana"}', qos=1).wait_for_publish(5)
        qa = client("qa-lead", port)
        qa.publish("watcher/ack/control-panel", b'{"alert": 1, "by": "posing"}', qos=1).wait_for_publish(5)
        wait_for(lambda: "watcher/ack/control-panel" in got, timeout=5, what="the operator's acknowledgement")
        # A last, allowed message from the last publisher: once it has arrived, every refused
        # message before it has been dealt with (a positive signal instead of a pause).
        qa.publish("watcher/ack/qa-lead", b'{"alert": 1, "by": "Sam"}', qos=1).wait_for_publish(5)
        wait_for(lambda: "watcher/ack/qa-lead" in got, timeout=5, what="the last, allowed message")
        # Only the panel's own topic got through: the last level is an identity the broker vouches for.
        assert sorted(t for t in got if t != "watcher/ack/qa-lead") == [
            "kestrel/bulk-a/s1/air",
            "watcher/ack/control-panel",
        ]
        for c in (w, bulk, panel, qa):
            c.loop_stop()
            c.disconnect()
    finally:
        proc.terminate()
        proc.wait(10)
    log = proc.stderr.read().decode()
    proc.stderr.close()
    assert not re.search(r"Error", log), log
