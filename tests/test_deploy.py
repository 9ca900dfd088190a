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
    assert mode("etc/watcher/watcher.toml") == 0o640
    assert mode("etc/watcher/credentials") == 0o700
    assert mode("etc/watcher/credentials/broker-password") == 0o600
    (root / "etc/watcher/watcher.toml").write_text("# edited by the site\n")
    (root / "var/lib/watcher").mkdir(parents=True)
    (root / "var/lib/watcher/watcher.db").write_text("data")
    again = install()
    assert "kept your" in again and (root / "etc/watcher/watcher.toml").read_text() == "# edited by the site\n"
    install("--uninstall")
    assert not (root / "opt/watcher").exists() and not (root / "etc/systemd/system/watcher.service").exists()
    assert (root / "var/lib/watcher/watcher.db").read_text() == "data"
    assert (root / "etc/watcher/watcher.toml").exists()
