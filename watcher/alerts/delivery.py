"""Notification delivery through apprise, from a durable outbox. The only importer of apprise.

A notification is first stored in the outbox table (in the same transaction as whatever caused
it), then sent by a deliverer that runs apart from ingestion, so a slow or dead receiver never
holds up readings. Each attempt keeps apprise's result and its log lines with the row; a failed
send is retried with a doubling delay (30 s up to an hour) and given up after `max_attempts`,
when the row stays in the table as `failed` for the record. Channel URLs carry credentials: only
their privacy-masked form is ever logged.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

import apprise

from watcher.store.db import Store

log = logging.getLogger("watcher.delivery")
RETRY_FIRST_S = 30.0
RETRY_MAX_S = 3600.0


@dataclass(frozen=True)
class Channel:
    url: str
    tags: tuple[str, ...] = ("alerts",)


@dataclass(frozen=True)
class Delivery:
    ok: bool
    result: str  # success, failure, partial, timeout or nomatch
    log: str


class Notifier:
    def __init__(self, channels: list[Channel]):
        self._apprise = apprise.Apprise()
        for ch in channels:
            if not self._apprise.add(ch.url, tag=list(ch.tags)):
                masked = apprise.Apprise.instantiate(ch.url, suppress_exceptions=True)
                shown = masked.url(privacy=True) if masked else "(an unreadable URL)"
                raise ValueError(f"notification channel {shown}: apprise cannot use this URL")

    def describe(self) -> list[str]:
        return [s.url(privacy=True) for s in self._apprise]

    def send(self, title: str, body: str, tags: list[str]) -> Delivery:
        result = self._apprise.notify(body=body, title=title, tag=list(tags) if tags else "all")
        lines = [f"{e.level} {e.message}" for e in result.logs()]
        return Delivery(bool(result), result.status.name.lower(), "\n".join(lines)[-4000:])


def deliver_due(store: Store, notifier: Notifier, now_s: float, max_attempts: int = 60) -> dict[str, int]:
    """Send what is due; record each attempt. Returns counts of sent, retried and failed."""
    counts = {"sent": 0, "retried": 0, "failed": 0}
    for row_id, title, body, tags, attempts in store.outbox_due(now_s):
        d = notifier.send(title, body, tags)
        if d.ok:
            store.outbox_record(row_id, "sent", d.result, d.log, now_s, now_s)
            counts["sent"] += 1
            continue
        tries = attempts + 1
        if tries >= max_attempts:
            store.outbox_record(row_id, "failed", d.result, d.log, now_s, now_s)
            counts["failed"] += 1
            log.error("notification %d given up after %d attempts: %s", row_id, tries, d.result)
        else:
            delay = min(RETRY_FIRST_S * 2 ** (tries - 1), RETRY_MAX_S)
            store.outbox_record(row_id, "pending", d.result, d.log, now_s, now_s + delay)
            counts["retried"] += 1
            log.warning("notification %d not delivered (%s); retrying in %.0f s", row_id, d.result, delay)
    return counts
