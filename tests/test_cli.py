"""The command line contract, checked from outside: output shapes, exit codes, messages."""

import json
import subprocess
import sys
from datetime import UTC, datetime, timedelta
from importlib import resources

import numpy as np
import pytest
from click.testing import CliRunner

from watcher.cli import main

PUBLISHED = str(resources.files("watcher.data") / "trials" / "sinclair-2025-table3.csv")
FIGURE_KEYS = {"mean_diameter_um", "d90_um", "budget_used_pct", "days_to_limit", "excess_growth_um"}


def write_series(path, days=3.0, step_min=10.0, base=-22.0, probe=False, iso=True, uneven=False):
    start = datetime(2026, 11, 23, tzinfo=UTC)
    rng = np.random.default_rng(3)
    lines = ["time,air_c" + (",product_c" if probe else "")]
    t = 0.0
    while t <= days * 1440:
        stamp = (
            (start + timedelta(minutes=t)).isoformat().replace("+00:00", "Z")
            if iso
            else f"{start.timestamp() + 60 * t:.0f}"
        )
        air = base + (6.0 if (t % 360) < 30 else 0.0)
        row = f"{stamp},{air:.2f}"
        if probe:
            row += "," + ("" if int(t) % 60 else f"{base + 0.5:.2f}")
        lines.append(row)
        t += step_min * (rng.uniform(0.5, 1.5) if uneven else 1.0)
    path.write_text("\n".join(lines) + "\n")
    return path


def run(*args):
    result = CliRunner().invoke(main, list(args), catch_exceptions=False)
    return result.exit_code, result.output


def test_simulate_prints_each_position_and_the_caution(tmp_path):
    """The table names every exposure position, the worst one, and the texture-only caution."""
    code, out = run("simulate", "--series", str(write_series(tmp_path / "s.csv")))
    assert code == 0
    assert "surface" in out and "core" in out
    assert "Most budget used:" in out
    assert "not a food-safety verdict" in out and "not a legal limit" in out


def test_simulate_json_contract(tmp_path):
    """--json: the five figures as numbers for the worst position, the same keys per position."""
    code, out = run("simulate", "--series", str(write_series(tmp_path / "s.csv", uneven=True)), "--json")
    assert code == 0
    data = json.loads(out)
    for key in FIGURE_KEYS:
        assert isinstance(data[key], float), key
    assert set(data["positions"]) == {"surface", "core"}
    for row in data["positions"].values():
        assert FIGURE_KEYS <= set(row)
    worst = data["positions"][data["worst_position"]]
    assert (
        data["budget_used_pct"]
        == worst["budget_used_pct"]
        == max(r["budget_used_pct"] for r in data["positions"].values())
    )
    assert data["setpoint_c"] == pytest.approx(-22.0)  # the series' median air temperature
    assert data["excess_growth_um"] > 0  # defrost peaks above the median cost growth
    # Ranges and the additive rule ride beside the figures; the old keys keep their meaning.
    assert data["budget_used_pct_low"] <= data["budget_used_pct"] <= data["budget_used_pct_high"]
    assert data["days_to_limit_low"] <= data["days_to_limit"] <= data["days_to_limit_high"]
    assert 0 < data["additive_rule_budget_pct"] <= data["budget_used_pct"] * 1.01


def test_simulate_epoch_times_probe_and_setpoint(tmp_path):
    """Epoch-second times work, a product_c column adds a probe position, --setpoint-c is used."""
    path = write_series(tmp_path / "p.csv", iso=False, probe=True)
    code, out = run("simulate", "--series", str(path), "--setpoint-c", "-25", "--json")
    assert code == 0
    data = json.loads(out)
    assert set(data["positions"]) == {"surface", "core", "probe"}
    assert data["positions"]["probe"]["product_c"] == pytest.approx(-21.5)
    assert data["setpoint_c"] == -25.0


def test_simulate_same_history_same_answer_in_any_time_format(tmp_path):
    """ISO 8601 and epoch seconds for the same instants give identical results."""
    a = json.loads(run("simulate", "--series", str(write_series(tmp_path / "a.csv", iso=True)), "--json")[1])
    b = json.loads(run("simulate", "--series", str(write_series(tmp_path / "b.csv", iso=False)), "--json")[1])
    assert a["positions"] == b["positions"]


@pytest.mark.parametrize(
    ("body", "message"),
    [
        ("time,air_c\n2026-11-01T00:00Z,-20\n2026-11-01T00:10Z,-20\n2026-11-01T00:05Z,-20\n", "line 4, column time"),
        (
            "time,air_c\n2026-11-01T00:00Z,-20\n2026-11-01T00:10Z,nan\n",
            "line 3, column air_c: got 'nan', expected a finite number",
        ),
        ("time,air_c\n2026-11-01T00:00Z,-20\nyesterday,-20\n", "line 3, column time: got 'yesterday'"),
        ("time,temp\n2026-11-01T00:00Z,-20\n2026-11-01T00:10Z,-20\n", "columns time, air_c"),
        ("time,air_c\n2026-11-01T00:00Z,-20\n2026-11-01T00:10Z,-400\n", "line 3, column air_c: got -400.0"),
    ],
)
def test_bad_series_exits_2_naming_the_row(tmp_path, body, message):
    """An unusable series stops with exit code 2 and a message naming file, row and column."""
    path = tmp_path / "bad.csv"
    path.write_text(body)
    result = CliRunner().invoke(main, ["simulate", "--series", str(path)])
    assert result.exit_code == 2
    assert message in result.output
    assert str(path) in result.output


def test_impossible_profile_exits_2_naming_the_field(tmp_path):
    """A profile with a limit below the initial size is refused with the field and value."""
    prof = tmp_path / "p.toml"
    prof.write_text(
        'name = "x"\n[texture]\nlimit_mean_diameter_um = 20.0\n[kinetics]\nk_ref_um3_per_day = 10.0\nactivation_energy_kj_per_mol = 50.0\n'
    )
    result = CliRunner().invoke(
        main, ["simulate", "--profile", str(prof), "--series", str(write_series(tmp_path / "s.csv"))]
    )
    assert result.exit_code == 2
    assert (
        "texture.limit_mean_diameter_um: got 20.0, expected a limit above the initial mean diameter (35.0 um)"
        in result.output
    )


def test_profile_show_json_prints_resolved_parameters():
    """`profile show NAME --json` prints every resolved parameter of the shipped profile."""
    code, out = run("profile", "show", "dairy-ice-cream", "--json")
    data = json.loads(out)
    assert code == 0
    assert data["name"] == "dairy-ice-cream"
    assert data["kinetics"]["form"] == "arrhenius"
    assert data["texture"]["limit_mean_diameter_um"] == 50.0
    assert data["ice"]["initial_freezing_point_c"] == -2.5


def test_calibrate_writes_a_profile_that_simulate_accepts(tmp_path):
    """calibrate fits the published trial, reports uncertainty and residuals, writes a usable TOML."""
    out_toml = tmp_path / "house.toml"
    code, out = run("calibrate", PUBLISHED, "--out", str(out_toml), "--json")
    assert code == 0
    assert "carried as a ratio" in json.loads(out)["limit_basis"]  # SEM pores: no light-microscopy limit
    fit = json.loads(out)
    assert fit["sd"]["k_ref_um3_per_day"] > 0 and fit["sd"]["activation_energy_kj_per_mol"] > 0
    assert len(fit["residuals"]) == 12
    assert fit["profile"]["name"] == "house"
    code, shown = run("profile", "show", str(out_toml), "--json")
    assert json.loads(shown)["kinetics"]["k_ref_um3_per_day"] == pytest.approx(fit["params"]["k_ref_um3_per_day"])
    code, sim = run("simulate", "--profile", str(out_toml), "--series", str(write_series(tmp_path / "s.csv")), "--json")
    assert code == 0 and json.loads(sim)["profile"] == "house"
    code, text = run("calibrate", PUBLISHED, "--out", str(tmp_path / "again.toml"))
    assert "Each temperature on its own" in text and "residual" in text


def test_console_script_is_a_real_process(tmp_path):
    """The installed `watcher` entry point runs as a process with the documented exit codes."""
    ok = subprocess.run(
        [sys.executable, "-m", "watcher", "simulate", "--series", str(write_series(tmp_path / "s.csv")), "--json"],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert ok.returncode == 0, ok.stderr
    assert FIGURE_KEYS <= set(json.loads(ok.stdout))
    bad = subprocess.run(
        [sys.executable, "-m", "watcher", "simulate", "--series", str(tmp_path / "missing.csv")],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert bad.returncode == 2
    assert "missing.csv" in bad.stderr and "Traceback" not in bad.stderr


def test_every_command_has_help_text():
    """Every command and group says what it does in --help."""

    def walk(cmd, path):
        yield path, cmd
        for name, sub in getattr(cmd, "commands", {}).items():
            yield from walk(sub, path + [name])

    for path, cmd in walk(main, []):
        assert cmd.help and cmd.help.strip(), path
        result = CliRunner().invoke(main, path + ["--help"])
        assert result.exit_code == 0 and cmd.help.split("\n")[0][:30] in result.output


def test_typed_times_are_site_time_and_printed_times_name_their_zone():
    """A time typed without an offset is the site's own (a date alone is its midnight); an
    offset or Z is kept; a printed time names its zone; a time that cannot be read says how to
    write one."""
    from watcher.cli.common import stamp, typed_time
    from watcher.errors import InputError

    def utc(*a):
        return datetime(*a, tzinfo=UTC).timestamp()

    assert typed_time("2026-07-01T08:00", "Europe/London", "--at") == utc(2026, 7, 1, 7)  # BST
    assert typed_time("2026-11-30", "Europe/Berlin", "--from") == utc(2026, 11, 29, 23)
    assert typed_time("2026-07-01T08:00Z", "Europe/London", "--at") == utc(2026, 7, 1, 8)
    assert typed_time("1782892800", "Europe/London", "--at") == 1782892800.0
    assert stamp(utc(2026, 7, 1, 7), "Europe/London") == "2026-07-01 08:00 BST"
    with pytest.raises(InputError, match="site time, Europe/London"):
        typed_time("30/11/2026", "Europe/London", "--from")
