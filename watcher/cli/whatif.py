"""`watcher what-if`: replay a zone's recorded period with an operating change, side by side."""

from __future__ import annotations

import json
from pathlib import Path

import click

from watcher.caution import SHORT
from watcher.cli.app import main
from watcher.cli.common import config_option, fmt, table, typed_time
from watcher.errors import InputError

ROWS = (
    ("budget_used_start_pct", "texture budget used at the start, %", ".2f"),
    ("budget_used_end_pct", "texture budget used at the end, %", ".2f"),
    ("additive_rule_end_pct", "the additive rule (sum of time / life) would say, %", ".2f"),
    ("budget_per_30_days_pct", "budget used per 30 days, %", ".2f"),
    ("days_to_limit_end", "days to the limit at the end (at its conditions)", ".0f"),
    ("mean_diameter_end_um", "mean crystal at the end, um", ".2f"),
    ("baseline_growth_pct", "growth at the setpoint over the period, % of budget", ".2f"),
)


@main.command("what-if")
@click.option("--zone", required=True, help="The zone whose recorded period is replayed.")
@click.option(
    "--from",
    "start",
    required=True,
    help="Start of the period: 2026-11-30, 2026-11-30T08:00 (site time without an offset) or epoch seconds.",
)
@click.option("--to", "end", required=True, help="End of the period (as --from).")
@click.option("--setpoint-offset", type=float, default=0.0, help="Run the room this many K colder (<0) or warmer.")
@click.option("--defrosts-per-day", type=int, default=None, help="Replace the recorded defrosts by N a day.")
@click.option("--defrost-min", type=float, default=30.0, show_default=True, help="Length of each scheduled defrost.")
@click.option(
    "--defrost-peak-c", type=float, default=None, help="Air at the top of a scheduled defrost (default setpoint + 6 K)."
)
@click.option("--door-factor", type=float, default=1.0, help="Scale each opening's air rise (strip curtain ~0.1).")
@click.option("--fewer-doors", type=float, default=0.0, help="Take out this percentage of the door openings (0-100).")
@click.option(
    "--without-event", "drop", type=int, multiple=True, help="Take out a recorded event (id from the summary)."
)
@click.option("--out", type=click.Path(file_okay=False), default=".", show_default=True, help="Folder for the chart.")
@click.option("--json", "as_json", is_flag=True)
@config_option()
def what_if(zone, start, end, setpoint_offset, defrosts_per_day, defrost_min, defrost_peak_c, door_factor, fewer_doors,
            drop, out, as_json, config_path) -> None:  # fmt: skip
    """Replay a zone's recorded period with an operating change and compare the texture
    budget used: setpoint, defrost schedule, door practice, or a recorded event taken out."""
    from watcher.config import load_config
    from watcher.engine.analysis import air_samples
    from watcher.engine.zones import ZoneRunner, spec_key
    from watcher.model.integrator import State, advance, new_state
    from watcher.store.db import Store
    from watcher.store.zones import unpack_state
    from watcher.whatif import Change, compare

    cfg = load_config(config_path)
    z = cfg.zone(zone)
    if z is None:
        raise InputError("--zone", zone, "one of " + ", ".join(x.id for x in cfg.zones))
    tz = cfg.site_of(zone).timezone
    t0, t1 = typed_time(start, tz, "--from"), typed_time(end, tz, "--to")
    if t1 <= t0:
        raise InputError("--to", end, "a time after --from")
    if not 0.0 <= door_factor <= 1.0:
        raise InputError("--door-factor", door_factor, "a factor in [0, 1]")
    if not 0.0 <= fewer_doors <= 100.0:
        raise InputError("--fewer-doors", fewer_doors, "a percentage in [0, 100]")
    if defrosts_per_day is not None and not 0 <= defrosts_per_day <= 24:
        raise InputError("--defrosts-per-day", defrosts_per_day, "0 to 24")
    change = Change(
        setpoint_offset, defrosts_per_day, defrost_min, defrost_peak_c, door_factor, fewer_doors, tuple(drop)
    )
    spec = ZoneRunner(z, 0.0, cfg.ingest.max_gap_s).spec  # the zone's own model settings
    store = Store.configured(cfg.storage, readonly=True)
    try:
        t, air = air_samples(store, zone, t0, t1)
        if t.size < 60:
            raise InputError(
                "--from/--to", f"{t.size} minutes of air readings", "at least an hour of readings in the zone"
            )
        events = [
            {"id": e["id"], "kind": e["kind"], "start_ts": e["start_ts"], "end_ts": e["end_ts"]}
            for e in store.events.of_zone(zone, t0, t1)
        ]
        unknown = set(drop) - {e["id"] for e in events}
        if unknown:
            raise InputError("--without-event", sorted(unknown), f"ids of events of {zone} in the period")
        snap = store.snapshots.before(zone, t0, spec_key(z))
        state = None if snap is None else State.from_arrays(unpack_state(snap[1]))
        if state is not None and state.time_ts < t0:  # bring the stored state up to the start
            pre_t, pre_air = air_samples(store, zone, state.time_ts, t0)
            if pre_t.size:
                state, _ = advance(spec, state, pre_t, pre_air[None, :])
    finally:
        store.close()
    if state is not None:
        origin = "the zone's model state at the start"
    else:
        state = new_state(spec, t0, air[0], z.setpoint_c)
        origin = "fresh product at the start (no model state stored for then)"
    result = compare(spec, state, t, air, z.setpoint_c, events, change)
    result["zone"], result["start_from"] = zone, origin
    from watcher.report.charts import whatif_chart

    folder = Path(out)
    folder.mkdir(parents=True, exist_ok=True)
    chart = folder / f"what-if-{zone}.svg"
    chart.write_text(whatif_chart(result, t, tz, f"{z.name}: {change.describe()}"))
    result["chart"] = str(chart)
    for key in ("air_recorded_c", "air_changed_c"):
        result.pop(key)
    if as_json:
        click.echo(json.dumps(result, indent=1))
        return
    click.echo(f"{z.name}, {result['period_days']:.1f} days replayed from {origin}.")
    click.echo(f"Change: {result['change']}\n")
    a, b = result["recorded"], result["changed"]
    lines = []
    for key, label, spec in ROWS:
        if key == "budget_per_30_days_pct" and result["per_30_days_extrapolated"]:
            label = f"budget used per 30 days at this period's rate (from {result['period_days']:.1f} days), %"
        diff = None if a[key] is None or b[key] is None else b[key] - a[key]
        lines.append([label, fmt(a[key], spec), fmt(b[key], spec), fmt(diff, "+" + spec)])
    for cause in a["excess_pct"]:
        x, y = a["excess_pct"][cause], b["excess_pct"][cause]
        lines.append([f"excess from {cause}s, % of budget", f"{x:.2f}", f"{y:.2f}", f"{y - x:+.2f}"])
    click.echo(table(lines, ["", "as recorded", "changed", "difference"], ["left", "right", "right", "right"]))
    click.echo(f"\nChart: {chart}")
    click.echo("It does not show that a change is safe or allowed: check changes to setpoints and defrosts with your")
    click.echo("refrigeration technician. " + SHORT)
