"""`watcher ack`, `watcher alerts`, `watcher test-notify` and `watcher verify`."""

from __future__ import annotations

import getpass
import json
import sys
import time

import click

from watcher.cli.app import main
from watcher.cli.common import config_option, db_options, open_record, site_tz, site_unit, stamp, table
from watcher.errors import InputError, StoreError


@main.command()
@click.argument("alert_id", type=int)
@click.option("--by", required=True, help="Who acknowledges (recorded with the time).")
@click.option("--note", default=None, help="A note kept with the acknowledgement.")
@click.option("--wait", "wait_s", default=10.0, show_default=True, help="Seconds to wait for the service to apply it.")
@db_options
def ack(alert_id, by, note, wait_s, config_path, db_path) -> None:
    """Acknowledge an open alert: stops its reminders and escalation.

    The running service applies the acknowledgement (it owns the alert state); when it is not
    running, the acknowledgement waits in the database and is applied at its next start.
    """
    from watcher.engine.alert_keeper import MAX_NAME, MAX_NOTE

    if not by.strip() or len(by) > MAX_NAME:
        raise InputError("--by", by, f"a name of 1-{MAX_NAME} characters")
    if note is not None and len(note) > MAX_NOTE:
        raise InputError("--note", f"{len(note)} characters", f"at most {MAX_NOTE}")
    store = open_record(config_path, db_path)
    try:
        alert = store.alerts.get(alert_id)
        if alert is None:
            click.echo(f"watcher: no alert {alert_id} (see `watcher alerts`)", err=True)
            sys.exit(1)
        if alert["status"] != "open":
            click.echo(f"watcher: alert {alert_id} is {alert['status']}; nothing to acknowledge", err=True)
            sys.exit(1)
        with store.atomic():
            cmd = store.commands.add(alert_id, by.strip(), note, "cli", getpass.getuser(), time.time())
        deadline = time.monotonic() + wait_s
        result = store.commands.result(cmd)
        while result is None and time.monotonic() < deadline:
            time.sleep(0.2)
            result = store.commands.result(cmd)
    finally:
        store.close()
    if result is None:
        click.echo(f"Alert {alert_id}: acknowledgement queued; the service applies it when it runs.")
    elif result == "acknowledged":
        click.echo(f"Alert {alert_id} acknowledged by {by.strip()}.")
    else:
        click.echo(f"watcher: alert {alert_id}: {result}", err=True)
        sys.exit(1)


@main.command()
@click.option("--open", "open_only", is_flag=True, help="Only alerts not yet cleared.")
@click.option("--json", "as_json", is_flag=True, help="Print JSON, with each alert's full log.")
@db_options
def alerts(open_only, as_json, config_path, db_path) -> None:
    """List alerts, newest first (read-only)."""
    from watcher.alerts.messages import fmt_value
    from watcher.config import load_config

    cfg = load_config(config_path) if config_path else None
    store = open_record(config_path, db_path, readonly=True)
    try:
        rows = store.alerts.list(open_only)
        fired = {r["id"]: next((x[3] for x in store.alerts.log(r["id"]) if x[0] == "raise"), None) for r in rows}
        if as_json:
            for r in rows:
                r["log"] = [
                    dict(zip(("step", "at_ts", "wall_ts", "value", "by", "note"), x)) for x in store.alerts.log(r["id"])
                ]
            click.echo(json.dumps(rows, indent=2))
            return
    finally:
        store.close()
    if not rows:
        click.echo("No open alerts." if open_only else "No alerts recorded.")
        return
    lines = [
        [
            str(r["id"]),
            r["status"],
            r["severity"],
            r["zone"],
            stamp(r["raised_ts"], site_tz(cfg, r["zone"])),
            fmt_value(r["metric"], fired[r["id"]], site_unit(cfg, r["zone"])),
            fmt_value(r["metric"], r["value"], site_unit(cfg, r["zone"])),
            r["label"] + (f" (ack: {r['acked_by']})" if r["acked_by"] else ""),
        ]
        for r in rows
    ]
    head = ["id", "status", "severity", "zone", "raised (data time)", "when raised", "latest", "what"]
    click.echo(table(lines, head, ["right", "left", "left", "left", "left", "right", "right", "left"]))
    if cfg is None:
        click.echo("Times in UTC (give --config for each site's own time zone).")


@main.command("test-notify")
@config_option()
@click.option("--tag", default=None, help="Only channels with this tag.")
def test_notify(config_path, tag) -> None:
    """Send a test message to each notification channel now, and report each result."""
    from watcher.alerts.delivery import Notifier
    from watcher.config import load_config

    cfg = load_config(config_path)
    channels = [c for c in cfg.channels if tag is None or tag in c.tags]
    if not channels:
        click.echo("watcher: no notification channel" + (f" tagged {tag!r}" if tag else "") + " in the configuration")
        sys.exit(1)
    notifier = Notifier(channels)
    shown = notifier.describe()
    failed = 0
    for c in channels:
        d = notifier.send(
            c.name,
            "watcher test message",
            f"A test from watcher at {stamp(time.time(), site_tz(cfg))} to channel {c.name} (tags: {', '.join(c.tags)}). "
            "No action needed.",
        )
        failed += not d.ok
        click.echo(f"{c.name:<16} {shown[c.name]:<48} {'sent' if d.ok else 'FAILED: ' + d.result}")
        if not d.ok and d.log:
            click.echo("    " + d.log.replace("\n", "\n    "))
    sys.exit(1 if failed else 0)


@main.command()
@click.option("--since", default=None, help="Check from this date (YYYY-MM-DD, UTC) on; default: everything.")
@db_options
def verify(since, config_path, db_path) -> None:
    """Recompute the record's hash chains and name the first row that no longer matches."""
    import datetime as dt

    since_ts = None
    if since:
        try:
            since_ts = dt.datetime.fromisoformat(since).replace(tzinfo=dt.UTC).timestamp()
        except ValueError:
            raise InputError("--since", since, "a date such as 2026-11-23") from None
    store = open_record(config_path, db_path, readonly=True)
    try:
        findings, counts = store.record.verify(since_ts)
        heads, mark = store.record.verified, store.record.since_mark
    finally:
        store.close()
    for name, n in sorted(counts.items()):
        click.echo(f"{name:<32} {n:>10} rows checked")
    if mark is not None:
        click.echo(
            f"Hashed from {since}, or after verification mark {mark['id']} ({stamp(mark['wall_ts'], 'UTC')}) where "
            "that is later; the rows that mark names still hold its hashes. A full `watcher verify` (no --since) "
            "hashes everything again."
        )
    if not findings:
        click.echo(
            "Record intact: every chain recomputes to its stored hashes and nothing checked is missing"
            + (f" (from {since})." if since else ".")
        )
        _record_mark(config_path, db_path, heads, since_ts)
        return
    for f in findings:
        where = f" row {f.row_id}" if f.row_id else ""
        click.echo(f"{f.kind} {f.chain}{where}: {f.what}")
    sys.exit(1)


def _record_mark(config_path: str | None, db_path: str | None, heads: dict, since_ts: float | None) -> None:
    """Record the intact verification as a mark (store/marks.py): the next `--since` and the
    daily check hash only what comes after it. Someone allowed to read the record but not to
    write it still gets the verification, without the mark."""

    try:
        store = open_record(config_path, db_path)
        try:
            with store.atomic():
                store.record.mark(heads, since_ts)
        finally:
            store.close()
    except StoreError as exc:
        click.echo(f"(no verification mark recorded: {exc})")


@main.command()
@config_option()
@click.option("--week", "week_label", default=None, help="ISO week such as 2026-W48 (default: the last complete week).")
@click.option("--site", "site_id", default=None, help="One site (default: every site).")
@click.option("--out", "out_dir", default=None, help="Folder for the files (default: [reports] dir).")
@click.option("--format", "formats", default="html,csv,json", show_default=True, help="Any of html, csv, json.")
@click.option("--send", is_flag=True, help="Also queue it for channels tagged `reports` (the service sends it).")
def report(config_path, week_label, site_id, out_dir, formats, send) -> None:
    """Write the weekly texture summary for audits and QA."""
    from watcher.config import Site, load_config
    from watcher.report.produce import produce
    from watcher.report.week import last_complete_week, week_of
    from watcher.store.db import Store

    cfg = load_config(config_path)
    chosen = [f.strip() for f in formats.split(",") if f.strip()]
    if not chosen or any(f not in ("html", "csv", "json") for f in chosen):
        raise InputError("--format", formats, "a comma-separated list among html, csv, json")
    sites = list(cfg.sites) or [Site("site", "", "UTC")]
    if site_id:
        sites = [s for s in sites if s.id == site_id]
        if not sites:
            raise InputError("--site", site_id, "one of " + ", ".join(s.id for s in cfg.sites))
    store = Store.configured(cfg.storage)
    try:
        for site in sites:
            week = week_of(week_label, site.timezone) if week_label else last_complete_week(time.time(), site.timezone)
            paths = produce(store, cfg, site, week, time.time(), out_dir or cfg.reports.dir, chosen, send, auto=False)
            progress = " (week in progress: the figures cover it so far)" if time.time() < week.end_ts else ""
            click.echo(f"{site.id} {week.label}{progress}: " + ", ".join(str(p) for p in paths if p.suffix != ".csv"))
            n_csv = sum(p.suffix == ".csv" for p in paths)
            if n_csv:
                click.echo(f"  and {n_csv} CSV tables in {paths[-1].parent}")
    finally:
        store.close()
