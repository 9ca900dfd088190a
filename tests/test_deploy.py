"""The systemd unit and the install script: verified, hardened, idempotent, data kept."""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
UNIT = ROOT / "deploy" / "watcher.service"


def analyze() -> str:
    exe = shutil.which("systemd-analyze")
    if exe is None:
        pytest.skip("systemd-analyze is not on this machine (Debian's systemd package provides it)")
    return exe


def unit_here(tmp_path: Path) -> Path:
    """The unit with ExecStart pointing at this checkout's watcher, so verify can check it."""
    text = UNIT.read_text().replace("/opt/watcher/venv/bin/watcher", str(Path(sys.executable).parent / "watcher"))
    path = tmp_path / "watcher.service"
    path.write_text(text)
    return path


def test_unit_verifies(tmp_path):
    """The shipped unit passes `systemd-analyze verify` and keeps its hardening and bounds lines."""
    out = subprocess.run([analyze(), "verify", str(unit_here(tmp_path))], capture_output=True, text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    text = UNIT.read_text()
    for line in (
        "Type=notify",
        "WatchdogSec=",
        "Restart=on-failure",
        "ExecReload=/bin/kill -HUP $MAINPID",
        "DynamicUser=yes",
        "StateDirectory=watcher",
        "ConfigurationDirectory=watcher",
        "LoadCredential=broker-password:",
        "ProtectSystem=strict",
        "ProtectHome=yes",
        "PrivateTmp=yes",
        "NoNewPrivileges=yes",
        "RestrictAddressFamilies=AF_UNIX AF_INET AF_INET6",
        "SystemCallFilter=@system-service",
        "CapabilityBoundingSet=\n",
    ):
        assert line in text, line


def test_unit_exposure_is_low(tmp_path):
    """systemd's own security review of the unit, offline: exposure at most 2.5."""
    out = subprocess.run(
        [analyze(), "security", "--offline=yes", str(unit_here(tmp_path))], capture_output=True, text=True, timeout=60
    )
    m = re.search(r"Overall exposure level for watcher\.service: ([0-9.]+)", out.stdout + out.stderr)
    assert m, out.stdout[-2000:] + out.stderr[-2000:]
    exposure = float(m.group(1))
    print(f"systemd-analyze security exposure: {exposure}")
    assert exposure <= 2.5


def test_install_upgrade_and_uninstall_keep_the_data(tmp_path):
    """A trial install into a folder: layout and permissions; a re-run keeps the edited
    configuration; uninstalling removes the program and unit and keeps data and configuration."""
    root = tmp_path / "root"
    env = {**os.environ, "PYTHON": sys.executable, "INSTALL_PIP_ARGS": "--no-deps"}

    def install(*args):
        out = subprocess.run(
            ["bash", str(ROOT / "deploy" / "install.sh"), "--root", str(root), *args],
            capture_output=True,
            text=True,
            env=env,
            timeout=600,
        )
        assert out.returncode == 0, out.stdout + out.stderr
        return out.stdout

    first = install()
    assert "wrote" in first and (root / "opt/watcher/venv/bin/watcher").exists()
    assert (root / "etc/systemd/system/watcher.service").read_text() == UNIT.read_text()
    mode = lambda p: (root / p).stat().st_mode & 0o777  # noqa: E731
    # 0644, not 0640 as before: the unit's DynamicUser is not in root's group and could not read it.
    assert mode("etc/watcher/watcher.toml") == 0o644
    assert mode("etc/watcher/credentials") == 0o700
    assert mode("etc/watcher/credentials/broker-password") == 0o600
    # one file per channel in credentials/notify/, which the unit loads whole (channel names are free)
    assert mode("etc/watcher/credentials/notify") == 0o700
    assert {
        p.name: mode(f"etc/watcher/credentials/notify/{p.name}")
        for p in (root / "etc/watcher/credentials/notify").iterdir()
    } == {
        "qa-mail": 0o600,
        "night-chat": 0o600,
    }
    (root / "etc/watcher/credentials/notify/qa-mail").write_text("mailtos://kept\n")
    (root / "etc/watcher/credentials/notify/freezer-pager").write_text("json://kept\n")
    (root / "etc/watcher/watcher.toml").write_text("# edited by the site\n")
    (root / "var/lib/watcher").mkdir(parents=True)
    (root / "var/lib/watcher/watcher.db").write_text("data")
    again = install()
    assert "kept your" in again and (root / "etc/watcher/watcher.toml").read_text() == "# edited by the site\n"
    assert (root / "etc/watcher/credentials/notify/qa-mail").read_text() == "mailtos://kept\n"
    assert (root / "etc/watcher/credentials/notify/freezer-pager").read_text() == "json://kept\n"
    install("--uninstall")
    assert not (root / "opt/watcher").exists() and not (root / "etc/systemd/system/watcher.service").exists()
    assert (root / "var/lib/watcher/watcher.db").read_text() == "data"
    assert (root / "etc/watcher/watcher.toml").exists()


LIMIT_KEYS = (
    "persistence",
    "autosave_interval",
    "max_queued_messages",
    "max_queued_bytes",
    "max_inflight_messages",
    "max_packet_size",
    "memory_limit",
)


def test_shipped_broker_limits_refuse_oversized_messages(tmp_path):
    """The shipped mosquitto.conf's limits, in a real mosquitto: a message larger than watcher
    accepts is refused by the broker (never queued or held), a normal one goes through."""
    import paho.mqtt.client as mqtt

    from tests.broker import MOSQUITTO, free_port

    shipped = (ROOT / "deploy" / "mosquitto" / "mosquitto.conf").read_text().splitlines()
    limits = [line for line in shipped if line.split(" ")[0] in LIMIT_KEYS]
    assert {line.split(" ")[0] for line in limits} == set(LIMIT_KEYS)  # every limit is set in the shipped file
    port = free_port()
    (tmp_path / "persist").mkdir()
    conf = tmp_path / "m.conf"
    conf.write_text(
        "\n".join(limits)
        + f"\nuser root\npersistence_location {tmp_path / 'persist'}/\nallow_anonymous true\nlistener {port} 127.0.0.1\n"
    )
    broker = subprocess.Popen([MOSQUITTO, "-c", str(conf)], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    got: list[int] = []
    try:
        from tests.broker import wait_listening
        from tests.service_harness import wait_for

        wait_listening(broker, port)
        sub = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="sub", protocol=mqtt.MQTTv5)
        sub.on_message = lambda c, u, m: got.append(len(m.payload))
        granted: list[int] = []
        sub.on_subscribe = lambda c, u, mid, codes, props: granted.append(mid)
        sub.connect("127.0.0.1", port)
        sub.subscribe("kp/#", qos=1)
        sub.loop_start()
        wait_for(lambda: granted, timeout=5, what="the subscription to be granted")
        for size in (60_000, 200_000, 16 * 1024 * 1024):
            pub = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"pub{size}", protocol=mqtt.MQTTv311)
            pub.connect("127.0.0.1", port)
            pub.loop_start()
            pub.publish("kp/bulk-a/s1/air", b"x" * size, qos=1).wait_for_publish(3)
            pub.loop_stop()
        # A last small message: once it arrives, the broker has dealt with every one before it
        # (a positive signal instead of a pause); it is not one of the sizes under test.
        last = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="pub-last", protocol=mqtt.MQTTv311)
        last.connect("127.0.0.1", port)
        last.loop_start()
        last.publish("kp/bulk-a/s1/air", b"x", qos=1).wait_for_publish(3)
        last.loop_stop()
        wait_for(lambda: 1 in got, timeout=10, what="the last small message")
        got.remove(1)
        sub.loop_stop()
    finally:
        broker.terminate()
        broker.wait(10)
    assert got == [60_000]


def test_an_upgrade_moves_the_older_credential_layout_and_its_names_still_resolve(tmp_path):
    """An install of the older layout (credentials/notify-<name>, one LoadCredential= line each)
    upgraded: the files move into credentials/notify/ unchanged, and the url_credential names
    the site already wrote resolve to what systemd hands over (notify_<file>)."""
    from watcher.config.reader import credential_path

    root = tmp_path / "root"
    creds = root / "etc/watcher/credentials"
    creds.mkdir(parents=True)
    (creds / "notify-qa-mail").write_text("mailtos://old\n")
    (creds / "notify-qa-mail").chmod(0o600)
    env = {**os.environ, "PYTHON": sys.executable, "INSTALL_PIP_ARGS": "--no-deps"}
    out = subprocess.run(
        ["bash", str(ROOT / "deploy" / "install.sh"), "--root", str(root)],
        capture_output=True,
        text=True,
        env=env,
        timeout=600,
    )
    assert out.returncode == 0 and "moved the notification credentials" in out.stdout, out.stdout + out.stderr
    assert not (creds / "notify-qa-mail").exists()
    assert (creds / "notify/notify-qa-mail").read_text() == "mailtos://old\n"
    handed = tmp_path / "run-credentials"  # what LoadCredential=notify:<dir> makes of it
    handed.mkdir()
    (handed / "notify_notify-qa-mail").write_text("mailtos://old\n")
    assert credential_path(handed, "notify-qa-mail").read_text() == "mailtos://old\n"
    assert credential_path(handed, "missing") == handed / "missing"  # and a missing one is named as written


def test_the_central_drop_in_loads_the_credentials_the_central_config_names(tmp_path):
    """deploy/fleet/central.conf beside the unit passes `systemd-analyze verify`, and every
    credential the shipped central configuration names is one the unit and drop-in load."""
    unit = unit_here(tmp_path)
    drop_in = tmp_path / "watcher.service.d"
    drop_in.mkdir()
    shutil.copy(ROOT / "deploy" / "fleet" / "central.conf", drop_in / "central.conf")
    out = subprocess.run([analyze(), "verify", str(unit)], capture_output=True, text=True, timeout=60)
    assert out.returncode == 0 and "central.conf" not in out.stderr, out.stderr  # read, and no line ignored
    loaded = set(
        re.findall(r"^LoadCredential=([^:]+):", UNIT.read_text() + (drop_in / "central.conf").read_text(), re.M)
    )
    named = set(
        re.findall(r'_credential = "([^"]+)"', (ROOT / "deploy" / "fleet" / "central-watcher.toml").read_text())
    )
    named = {"notify" if n == "qa-team" else n for n in named}  # notify URLs come as the notify/ folder
    assert named and named <= loaded, named - loaded
