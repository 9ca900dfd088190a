"""`watcher init`: a starter configuration from a few answers, as flags or at prompts, checked
with the same reader as every configuration."""

import stat
import subprocess
import sys

from watcher.config import load_config


def run(*args, cwd, stdin=""):
    return subprocess.run(
        [sys.executable, "-m", "watcher", "init", *args],
        capture_output=True,
        text=True,
        timeout=60,
        cwd=cwd,
        input=stdin,
    )


def test_flags_write_a_configuration_that_checks_once_its_secrets_are_in(tmp_path):
    """Flags for scripts: the file names the site, zones with setpoints, broker, topics and a
    channel; secrets go in 0600 files it creates empty (never on the command line); it checks
    valid apart from them, and check-config passes once they are written."""
    out = run(
        "--out", "site.toml", "--site-id", "bayside", "--site-name", "Bayside Cold Store", "--timezone", "Europe/Dublin",
        "--zone", "bulk:-25:Bulk store", "--zone", "pick:-22", "--broker", "10.0.0.5:1884",
        "--door-topic", "bayside/{zone}/door", "--channel", "qa-mail", "--product", "gelato",
        cwd=tmp_path,
    )  # fmt: skip
    assert out.returncode == 0, out.stdout + out.stderr
    assert "valid apart from the secrets still to be written" in out.stdout
    secrets = tmp_path / "secrets"
    for name in ("broker-password", "notify-qa-mail"):
        assert stat.S_IMODE((secrets / name).stat().st_mode) == 0o600 and (secrets / name).read_text() == ""
    (secrets / "broker-password").write_text("pw\n")
    (secrets / "notify-qa-mail").write_text("mailto://qa:x@smtp.bayside.example/?to=qa@bayside.example\n")
    cfg = load_config(str(tmp_path / "site.toml"))
    assert [(z.id, z.name, z.setpoint_c) for z in cfg.zones] == [("bulk", "Bulk store", -25.0), ("pick", "pick", -22.0)]
    assert [z.profile.name for z in cfg.zones] == ["gelato", "gelato"]
    assert (cfg.sites[0].name, cfg.sites[0].timezone) == ("Bayside Cold Store", "Europe/Dublin")
    assert (cfg.broker.host, cfg.broker.port, cfg.broker.client_id) == ("10.0.0.5", 1884, "watcher-bayside")
    assert [s.pattern.filter for s in cfg.sources] == ["bayside/+/+/air", "bayside/+/door"]
    assert [c.name for c in cfg.channels] == ["qa-mail"]
    check = subprocess.run(
        [sys.executable, "-m", "watcher", "check-config", str(tmp_path / "site.toml")], capture_output=True, text=True
    )
    assert check.returncode == 0 and "valid." in check.stdout, check.stderr


def test_prompts_ask_for_what_flags_did_not_give(tmp_path):
    """--ask (the default at a terminal) asks each question; the answers make the same file."""
    answers = (
        "coldbay\nCold Bay Foods\nEurope/Oslo\nhard:-30:Hardening,store:-25\nwater-ice-sorbet\n127.0.0.1:1883\n"
        "{site}/{zone}/{sensor}/t\nnumber\n"
    )
    out = run("--ask", "--out", "c.toml", cwd=tmp_path, stdin=answers)
    assert out.returncode == 0, out.stdout + out.stderr
    (tmp_path / "secrets/broker-password").write_text("pw\n")
    cfg = load_config(str(tmp_path / "c.toml"))
    assert [z.id for z in cfg.zones] == ["hard", "store"] and cfg.sites[0].timezone == "Europe/Oslo"
    assert {z.profile.name for z in cfg.zones} == {"water-ice-sorbet"} and "plant-based-dessert" in out.stdout
    assert cfg.sources[0].fmt == "number" and cfg.sources[0].pattern.filter == "coldbay/+/+/t"


def test_it_never_overwrites_and_refuses_bad_answers_with_exit_2(tmp_path):
    """An existing file is kept unless --force; a zone without a setpoint, an unknown product
    (nothing written) and a time zone the reader refuses stop with exit 2 naming the problem."""
    (tmp_path / "watcher.toml").write_text("# mine\n")
    kept = run("--zone", "a:-25", cwd=tmp_path)
    assert kept.returncode == 2 and "exists; give --force" in kept.stderr
    assert (tmp_path / "watcher.toml").read_text() == "# mine\n"
    bad_zone = run("--out", "x.toml", "--zone", "bulk", cwd=tmp_path)
    assert bad_zone.returncode == 2 and "expected ID:SETPOINT_C[:NAME]" in bad_zone.stderr
    bad_product = run("--out", "p.toml", "--zone", "a:-25", "--product", "honey", cwd=tmp_path)
    assert bad_product.returncode == 2 and "'honey'" in bad_product.stderr and "gelato" in bad_product.stderr
    assert not (tmp_path / "p.toml").exists()
    bad_tz = run("--out", "y.toml", "--zone", "a:-25", "--timezone", "Mars/Base", cwd=tmp_path)
    assert bad_tz.returncode == 2 and "sites[0].timezone: got 'Mars/Base'" in bad_tz.stderr, bad_tz.stderr
