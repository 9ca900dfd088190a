"""Notification delivery through apprise, from a durable outbox. The only importer of apprise.

A notification is first stored in the outbox table (in the same transaction as whatever caused
it), then sent by a deliverer that runs apart from ingestion, so a slow or dead receiver never
holds up readings. Each attempt keeps apprise's result and its log lines with the row; a failed
send is retried with a doubling delay (30 s up to an hour) and given up after `max_attempts`,
when the row stays in the table as `failed` for the record. Each row names one channel, so a
retry reaches only the channel that failed. Channel URLs carry credentials: only their masked
form (alerts/secrets.py) is ever logged, and apprise's log lines are scrubbed of the URL's
secret parts before they are kept or printed.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

import apprise

from watcher.alerts.channels import Channel
from watcher.alerts.messages import as_html
from watcher.alerts.secrets import mask_url, scrub
from watcher.store.db import Store

log = logging.getLogger("watcher.delivery")
RETRY_FIRST_S = 30.0
RETRY_MAX_S = 3600.0


@dataclass(frozen=True)
class Delivery:
    ok: bool
    result: str  # success, failure, partial, timeout or nomatch
    log: str


def usable(url: str) -> bool:
    return apprise.Apprise.instantiate(url, suppress_exceptions=True) is not None


class Notifier:
    """One apprise object per channel, so each outbox row reaches exactly its channel."""

    def __init__(self, channels: list[Channel]):
        self.channels = {c.name: c for c in channels}
        self._apprise: dict[str, apprise.Apprise] = {}
        for ch in channels:
            a = apprise.Apprise()
            if not a.add(ch.url):
                raise ValueError(f"notification channel {ch.name} ({mask_url(ch.url)}): apprise cannot use this URL")
            if ch.min_interval_s is not None:
                for plugin in a:
                    plugin.request_rate_per_sec = ch.min_interval_s  # apprise's name; it is seconds between sends
            self._apprise[ch.name] = a

    def describe(self) -> dict[str, str]:
        """Channel name -> masked URL (safe to log and print: alerts/secrets.py)."""
        return {name: mask_url(self.channels[name].url) for name in self._apprise}

    def send(self, channel: str, title: str, body: str, attach: str | None = None, level: str = "info") -> Delivery:
        """level: info, success, warning or failure (a webhook's `type`, a chat message's colour).
        E-mail goes as HTML with the plain text as its alternative; other channels get the text."""
        a = self._apprise.get(channel)
        if a is None:
            return Delivery(False, "nochannel", f"no channel named {channel!r} in the configuration")
        kind = apprise.NotifyType(level) if level in {t.value for t in apprise.NotifyType} else apprise.NotifyType.INFO
        if self.channels[channel].url.split(":", 1)[0].lower() in MAIL_SCHEMES:
            result = a.notify(
                body=as_html(body), title=title, attach=attach, notify_type=kind, body_format=apprise.NotifyFormat.HTML
            )
        else:
            result = a.notify(
                body=body, title=title, attach=attach, notify_type=kind, body_format=apprise.NotifyFormat.TEXT
            )
        lines = [f"{e.level} {e.message}" for e in result.logs()]
        text = scrub("\n".join(lines), [self.channels[channel].url])  # kept in the outbox and printed
        return Delivery(bool(result), result.status.name.lower(), text[-4000:])


MAIL_SCHEMES = ("mailto", "mailtos")
REPEAT_NOTE = "(This message may repeat one sent just before a restart.)\n\n"


def deliver_due(
    store: Store, notifier: Notifier, now_ts: float, max_attempts: int = 60, retry_first_s: float = RETRY_FIRST_S
) -> dict[str, int]:
    """Send what is due; record each attempt. Returns counts of sent, retried and failed."""
    counts = {"sent": 0, "retried": 0, "failed": 0}
    for row_id, channel, title, body, attempts, attach, maybe_repeat, level in store.outbox.due(now_ts):
        with store.atomic():
            store.outbox.mark_sending(row_id)
        d = notifier.send(channel, title, (REPEAT_NOTE if maybe_repeat else "") + body, attach, level)
        with store.atomic():
            if d.ok:
                store.outbox.record(row_id, "sent", d.result, d.log, now_ts, now_ts)
                counts["sent"] += 1
                continue
            tries = attempts + 1
            if tries >= max_attempts:
                store.outbox.record(row_id, "failed", d.result, d.log, now_ts, now_ts)
                counts["failed"] += 1
                log.error("notification %d to %s given up after %d attempts: %s", row_id, channel, tries, d.result)
            else:
                delay = min(retry_first_s * 2 ** (tries - 1), RETRY_MAX_S)
                store.outbox.record(row_id, "pending", d.result, d.log, now_ts, now_ts + delay)
                counts["retried"] += 1
                log.warning(
                    "notification %d to %s not delivered (%s); retrying in %.0f s", row_id, channel, d.result, delay
                )
    return counts
