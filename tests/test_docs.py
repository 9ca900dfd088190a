"""The documentation stays true: set-up commands, CI entry point, every command documented."""

from pathlib import Path

from click.testing import CliRunner

from watcher.cli import main

ROOT = Path(__file__).resolve().parent.parent


def commands(group, prefix=()):
    for name, cmd in group.commands.items():
        path = prefix + (name,)
        if hasattr(cmd, "commands"):
            yield from commands(cmd, path)
        else:
            yield " ".join(path)


def test_readme_gives_the_two_setup_commands_and_the_job():
    """README opens with the job and names the demo and the test command."""
    text = (ROOT / "README.md").read_text()
    first = text.split("\n\n")[1]
    assert "ice cream" in first and "cold stores" in first
    assert "bash scripts/demo.sh" in text and "bash scripts/test.sh" in text


def test_ci_runs_the_readme_test_command():
    """.ci/run calls the same test script the README gives, which installs the broker."""
    assert "scripts/test.sh" in (ROOT / ".ci" / "run").read_text()
    assert "apt-get install -y" in (ROOT / "scripts" / "test.sh").read_text()


def test_every_command_is_documented():
    """Each CLI command appears in docs/cli.md with its full name."""
    doc = (ROOT / "docs" / "cli.md").read_text()
    for name in commands(main):
        assert f"watcher {name}" in doc, name


def test_changelog_and_guide_exist_with_sections():
    """CHANGELOG keeps an Unreleased section; the contributor guide has its module map."""
    assert "## [Unreleased]" in (ROOT / "CHANGELOG.md").read_text()
    guide = (ROOT / "DEVELOPERS.md").read_text()
    for heading in ("## Architecture", "## Module map", "## Run, test, benchmark", "## Conventions"):
        assert heading in guide


def test_version_option_works():
    """`watcher --version` prints the package version."""
    from watcher import __version__

    result = CliRunner().invoke(main, ["--version"])
    assert result.exit_code == 0 and __version__ in result.output


def test_config_example_is_valid(tmp_path, monkeypatch):
    """config.example.toml passes validation once its secret and CA paths point at real files."""
    import tomllib

    from tests.broker import make_ca
    from watcher.config import config_from_dict

    data = tomllib.loads((ROOT / "config.example.toml").read_text())
    creds = tmp_path / "credentials"  # as systemd's LoadCredential= would hand them over
    creds.mkdir()
    (creds / "broker-password").write_text("pw\n")
    for name in ("notify_qa-mail", "notify_night-chat"):  # files of credentials/notify/, as systemd names them
        (creds / name).write_text("mailto://user:pw@smtp.kestrel.example/?to=qa@kestrel.example\n")
    monkeypatch.setenv("CREDENTIALS_DIRECTORY", str(creds))
    data["broker"]["tls"]["ca_file"] = str(make_ca(tmp_path)["ca"])
    data["storage"]["path"] = str(tmp_path / "w.db")
    cfg = config_from_dict(data, "config.example.toml")
    assert [c.name for c in cfg.channels] == ["qa-mail", "night-chat"]
    assert {r.id for r in cfg.alerting.rules} >= {"door-open", "core-benchmark", "budget-80"}
    assert "defrosts-per-day" not in {r.id for r in cfg.alerting.rules}
    assert [z.id for z in cfg.zones] == ["hardening", "bulk-a", "dispatch"]
    assert {s.signal for s in cfg.sources} == {"air_c", "product_c", "door", "defrost"}


def test_configuration_reference_is_current():
    """docs/configuration.md is generated from the reader; regenerate it when a key changes
    (python -m watcher.config_doc > docs/configuration.md)."""
    from watcher.config_doc import render

    assert (ROOT / "docs" / "configuration.md").read_text() == render()


def test_docs_cover_deploy_security_and_scaling():
    """The operator documents exist and point at the deploy files they describe."""
    security = (ROOT / "docs" / "security.md").read_text()
    assert "deploy/watcher.service" in security and "deploy/mosquitto/" in security
    assert "PostgreSQL" in (ROOT / "docs" / "scaling.md").read_text()
    assert "docs/img/weekly-summary.png" in (ROOT / "README.md").read_text()
