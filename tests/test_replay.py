"""`watcher replay` runs a recorded CSV through the service's engine into the database."""

import json

import pytest
from click.testing import CliRunner

from watcher.cli import main

T0 = 1_795_000_000


def write_config(tmp_path, db_name="w.db"):
    (tmp_path / "pw").write_text("x")
    cfg = tmp_path / "c.toml"
    cfg.write_text(
        f'[broker]\npassword_file = "{tmp_path / "pw"}"\n[storage]\npath = "{tmp_path / db_name}"\n'
        '[[sites]]\nid = "kp"\n[[zones]]\nid = "bulk-a"\nsetpoint_c = -25.0\n'
        '[[sources]]\npattern = "kp/{zone}/{sensor}/air"\nsignal = "air_c"\n'
    )
    return cfg


def test_replay_then_status(tmp_path):
    """Replayed readings are stored once (a second replay only finds duplicates) and status shows them."""
    cfg = write_config(tmp_path)
    rows = ["time,zone,signal,value,sensor"]
    for k in range(2 * 1440):
        rows.append(f"{T0 + 60 * k},bulk-a,air_c,{-25.0 + (5.0 if k % 360 < 30 else 0.0)},s1")
    rows.append(f"{T0 + 600},bulk-a,door,1,door-1")
    (tmp_path / "r.csv").write_text("\n".join(rows) + "\n")
    first = CliRunner().invoke(main, ["replay", "--config", str(cfg), str(tmp_path / "r.csv")])
    assert first.exit_code == 0, first.output
    assert "accepted: 2881" in first.output
    again = CliRunner().invoke(main, ["replay", "--config", str(cfg), str(tmp_path / "r.csv")])
    assert "duplicate: 2881" in again.output
    status = json.loads(CliRunner().invoke(main, ["status", "--config", str(cfg), "--json"]).output)
    zone = status["zones"][0]
    assert zone["id"] == "bulk-a" and zone["readings_total"] == 2881
    assert zone["budget_used_pct"] > 0 and zone["air_c"] == pytest.approx(-25.0)
    # Ranges beside the old keys; two days of fresh product at -25 C leave a year or more.
    assert zone["budget_used_pct_low"] < zone["budget_used_pct"] < zone["budget_used_pct_high"]
    assert 365 <= zone["days_to_limit_low"] < zone["days_to_limit"] < zone["days_to_limit_high"]
    text = CliRunner().invoke(main, ["status", "--config", str(cfg)]).output
    assert "bulk-a" in text and "not a food-safety verdict" in text
    low, high = round(zone["days_to_limit_low"]), round(zone["days_to_limit_high"])
    assert f"({low}-{high})" in text  # the table shows the range beside the figure


def test_replay_bad_row_exits_2(tmp_path):
    """A row with an unknown zone stops the replay with exit 2 naming the line."""
    cfg = write_config(tmp_path)
    (tmp_path / "r.csv").write_text("time,zone,signal,value\n2026-11-30T00:00:00Z,bulk-b,air_c,-20\n")
    result = CliRunner().invoke(main, ["replay", "--config", str(cfg), str(tmp_path / "r.csv")])
    assert result.exit_code == 2
    assert "line 2, column zone: got 'bulk-b'" in result.output


def test_replay_orders_a_shuffled_file_checks_it_all_first_and_leaves_no_scratch(tmp_path):
    """A file in any order is replayed in time order (the same figures as the sorted file); a
    bad row near the end stops it before anything reaches the record; either way the staging
    folder beside the database is gone afterwards."""
    import random

    rows = [f"{T0 + 60 * k},bulk-a,air_c,{-25.0 + (4.0 if k % 240 < 20 else 0.0)},s1" for k in range(1440)]
    results = []
    for name, order in (("sorted", rows), ("shuffled", random.Random(7).sample(rows, len(rows)))):
        folder = tmp_path / name
        folder.mkdir()
        cfg = write_config(folder)
        (folder / "r.csv").write_text("time,zone,signal,value,sensor\n" + "\n".join(order) + "\n")
        done = CliRunner().invoke(main, ["replay", "--config", str(cfg), str(folder / "r.csv")])
        assert done.exit_code == 0 and "accepted: 1440" in done.output, done.output
        status = json.loads(CliRunner().invoke(main, ["status", "--config", str(cfg), "--json"]).output)
        results.append(status["zones"][0])
        assert not list(folder.glob(".watcher-staging-*"))
    assert results[0]["budget_used_pct"] == pytest.approx(results[1]["budget_used_pct"], rel=1e-9)
    assert results[0]["mean_diameter_um"] == pytest.approx(results[1]["mean_diameter_um"], rel=1e-9)

    bad = tmp_path / "bad"
    bad.mkdir()
    cfg = write_config(bad)
    (bad / "r.csv").write_text(
        "time,zone,signal,value,sensor\n" + "\n".join(rows) + "\nnot-a-time,bulk-a,air_c,-25,s1\n"
    )
    refused = CliRunner().invoke(main, ["replay", "--config", str(cfg), str(bad / "r.csv")])
    assert refused.exit_code == 2 and "line 1442, column time" in refused.output, refused.output
    assert not list(bad.glob(".watcher-staging-*"))
    assert not (bad / "w.db").exists()  # the record was not even opened


def test_a_first_replay_makes_the_database_folder(tmp_path):
    """The database's folder need not exist yet: replay makes it (as the service does) and the
    scratch file beside the database with it."""
    cfg = write_config(tmp_path, "new/folder/w.db")
    (tmp_path / "r.csv").write_text("time,zone,signal,value\n" + f"{T0},bulk-a,air_c,-25.0\n")
    done = CliRunner().invoke(main, ["replay", "--config", str(cfg), str(tmp_path / "r.csv")])
    assert done.exit_code == 0 and "accepted: 1" in done.output, done.output
    assert (tmp_path / "new/folder/w.db").is_file() and not list((tmp_path / "new/folder").glob(".watcher-staging-*"))
