"""`watcher lot arrive|move|depart|show|import` and `watcher lots`."""

from __future__ import annotations

import json
import sys
import time

import click

from watcher.caution import SHORT
from watcher.cli.app import main
from watcher.cli.common import config_option, fmt, site_tz, stamp, table, typed_time
from watcher.errors import InputError
from watcher.lots.rank import rank_key
from watcher.ranges import figure_text

CSV_COLUMNS = ("event", "lot", "zone", "time", "product", "mean_diameter_um", "budget_used_pct", "note")


def _record(config_path: str, docs: list[tuple[dict, str]], source: str) -> int:
    """Validate and store events in one transaction: all of them or none."""
    import getpass

    from watcher.config import load_config
    from watcher.engine.lots import record_event
    from watcher.store.db import Store

    cfg = load_config(config_path)
    store = Store.configured(cfg.storage)
    try:
        with store.atomic():
            for doc, where in docs:
                if isinstance(doc.get("time"), str):  # typed by a person: without a zone, it is site time
                    doc = {**doc, "time": typed_time(doc["time"], site_tz(cfg, doc.get("zone")), f"{where}: time")}
                record_event(store, cfg, doc, where, source, getpass.getuser(), time.time())
    finally:
        store.close()
    return len(docs)


def _initial(mean_um, budget_pct, history) -> dict | None:
    given = [x is not None for x in (mean_um, budget_pct, history)]
    if sum(given) > 1:
        raise InputError("--mean-um/--budget-used/--history", "more than one", "at most one starting state")
    if mean_um is not None:
        return {"mean_diameter_um": mean_um}
    if budget_pct is not None:
        return {"budget_used_pct": budget_pct}
    if history is not None:
        from watcher.files.series import read_series

        s = read_series(history)
        return {"history": [[float(t), float(c)] for t, c in zip(s.time_ts, s.air_c)]}
    return None


@main.group()
def lot() -> None:
    """Record where a lot is (arrive, move, depart), show one, or import a CSV of events."""


@lot.command("arrive")
@click.argument("lot_id")
@click.option("--zone", required=True, help="The zone the lot is put away in.")
@click.option(
    "--at",
    "at",
    default=None,
    help="When: 2026-11-30T08:00 (site time without an offset), epoch seconds; default: now.",
)
@click.option("--product", default=None, help="Product profile (default: dairy-ice-cream).")
@click.option("--mean-um", type=float, default=None, help="Declared mean crystal diameter on arrival, um.")
@click.option("--budget-used", type=float, default=None, help="Declared texture budget already used, %.")
@click.option(
    "--history", type=click.Path(exists=True, dir_okay=False), help="CSV (time, air_c) of its storage so far."
)
@click.option("--note", default=None)
@config_option()
def lot_arrive(lot_id, zone, at, product, mean_um, budget_used, history, note, config_path) -> None:
    """A lot arrives: fresh from hardening unless a starting state is given."""
    doc = {"event": "arrive", "lot": lot_id, "zone": zone, "time": _at(at), "product": product, "note": note}
    doc["initial"] = _initial(mean_um, budget_used, history)
    _record(config_path, [(doc, "watcher lot arrive")], "cli")
    click.echo(f"Lot {lot_id} arrived in {zone}.")


@lot.command("move")
@click.argument("lot_id")
@click.option("--to", "zone", required=True, help="The zone it moves to.")
@click.option("--at", "at", default=None, help="When (site time without an offset; default: now).")
@click.option("--note", default=None)
@config_option()
def lot_move(lot_id, zone, at, note, config_path) -> None:
    """A lot moves to another zone."""
    _record(
        config_path,
        [({"event": "move", "lot": lot_id, "zone": zone, "time": _at(at), "note": note}, "watcher lot move")],
        "cli",
    )
    click.echo(f"Lot {lot_id} moved to {zone}.")


@lot.command("depart")
@click.argument("lot_id")
@click.option("--at", "at", default=None, help="When (site time without an offset; default: now).")
@click.option("--note", default=None)
@config_option()
def lot_depart(lot_id, at, note, config_path) -> None:
    """A lot leaves the store: its figures stop there and stay on record."""
    _record(
        config_path, [({"event": "depart", "lot": lot_id, "time": _at(at), "note": note}, "watcher lot depart")], "cli"
    )
    click.echo(f"Lot {lot_id} departed.")


@lot.command("import")
@click.argument("csv_path", type=click.Path(exists=True, dir_okay=False))
@config_option()
def lot_import(csv_path, config_path) -> None:
    """Import lot events from a CSV (columns: event, lot, zone, time, and optionally product,
    mean_diameter_um, budget_used_pct, note), in file order. All rows or none."""
    from watcher.files.csvtable import read_rows

    _, rows = read_rows(csv_path, ("event", "lot", "time"), InputError)
    docs = []
    for line, row in rows:
        where = f"{csv_path}: line {line}"
        unknown = set(row) - set(CSV_COLUMNS)
        if unknown:
            raise InputError(f"{where}: columns", sorted(unknown), "only " + ", ".join(CSV_COLUMNS))
        doc = {k: (row.get(k) or None) for k in ("event", "lot", "zone", "time", "product", "note")}
        initial = {}
        for key in ("mean_diameter_um", "budget_used_pct"):
            if row.get(key):
                try:
                    initial[key] = float(row[key])
                except ValueError:
                    raise InputError(f"{where}: {key}", row[key], "a number") from None
        if doc["time"] and doc["time"].replace(".", "", 1).isdigit():
            doc["time"] = float(doc["time"])
        doc["initial"] = initial or None
        docs.append((doc, where))
    n = _record(config_path, docs, "csv")
    click.echo(f"{n} lot events imported from {csv_path}.")


@lot.command("show")
@click.argument("lot_id")
@click.option("--json", "as_json", is_flag=True)
@config_option()
def lot_show(lot_id, as_json, config_path) -> None:
    """One lot: where it has been, and its texture figures as last computed by the service."""
    rows, tz = _overview(config_path)
    row = next((r for r in rows if r["lot"] == lot_id), None)
    if row is None:
        click.echo(f"watcher: no lot {lot_id} (see `watcher lots`)", err=True)
        sys.exit(1)
    if as_json:
        click.echo(json.dumps(row, indent=1))
        return
    f = row["figures"] or {}
    click.echo(f"Lot {lot_id} ({row['product']}), {'in ' + row['zone'] if row['present'] else 'departed'}")
    for kind, zone, ts in row["history"]:
        click.echo(f"  {stamp(ts, tz)}  {kind:<7} {zone or ''}")
    if not f:
        click.echo("  Not computed yet: the service computes lots at its next analysis pass.")
        return
    click.echo(
        f"  As of {stamp(f['time_ts'], tz)}: {figure_text(f, 'budget_used_pct', '.1f')} % of the texture budget "
        f"used ({f['worst_position']}), mean crystal {fmt(f['mean_diameter_um'], '.1f')} um, "
        f"{figure_text(f, 'days_to_limit', '.0f', 'no limit in sight')} days to the limit at current "
        "conditions (90 % range in brackets)."
    )
    click.echo("  " + SHORT)


@main.command("lots")
@click.option("--zone", default=None, help="Only lots in this zone.")
@click.option("--all", "everything", is_flag=True, help="Include departed lots.")
@click.option("--json", "as_json", is_flag=True)
@config_option()
def lots_cmd(zone, everything, as_json, config_path) -> None:
    """Lots ranked by texture life left: the first should leave first."""
    everyone, tz = _overview(config_path)
    rows = [r for r in everyone if (everything or r["present"]) and (zone is None or r["zone"] == zone)]
    rows.sort(key=rank_key)
    if as_json:
        click.echo(json.dumps(rows, indent=1))
        return
    if not rows:
        click.echo("No lots recorded" + (f" in {zone}" if zone else "") + " (see `watcher lot arrive`).")
        return
    lines = []
    for i, r in enumerate(rows, 1):
        f = r["figures"] or {}
        lines.append(
            [
                str(i),
                r["lot"],
                r["zone"] if r["present"] else f"{r['zone']} (gone)",
                r["product"],
                figure_text(f, "budget_used_pct", ".1f"),
                fmt(f.get("mean_diameter_um"), ".1f"),
                figure_text(f, "days_to_limit", ".0f"),
                stamp(f["time_ts"], tz) if f else "not computed yet",
            ]
        )
    head = ["#", "lot", "zone", "product", "budget used %", "mean um", "days left", "as of"]
    click.echo(table(lines, head, ["right", "left", "left", "left", "right", "right", "right", "left"]))
    click.echo(
        "Days left: at current conditions; brackets: 90 % range from the profile's uncertainty (ranked by the "
        "central figure). " + SHORT
    )


def _overview(config_path: str) -> tuple[list[dict], str]:
    """Every lot, and the time zone to show their times in."""
    from watcher.config import load_config
    from watcher.store.db import Store

    cfg = load_config(config_path)
    store = Store.configured(cfg.storage, readonly=True)
    try:
        return store.lots.overview(), site_tz(cfg)
    finally:
        store.close()


def _at(raw: str | None):
    if raw is None:
        return None
    try:
        return float(raw)
    except ValueError:
        return raw
