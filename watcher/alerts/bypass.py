"""The storage alert when the database itself cannot be written (disk full, locked too long).

Every other notification goes through the outbox, which lives in the database: exactly what a
full disk stops. So while commits fail, the writer hands each failure to `StorageBypass`, which
sends the `commit_failing_s` rule's alert straight to its channels from memory (on a thread of
its own, never holding up the retries), repeats it at the alert repeat interval, and keeps what
was sent. When commits work again, the monitor records the whole episode (raised, each
out-of-band send, cleared) and queues a clear notice through the outbox as usual.
"""

from __future__ import annotations

import logging
import threading
from dataclasses import dataclass, field

from watcher.alerts import messages
from watcher.alerts.channels import route
from watcher.alerts.delivery import Notifier

log = logging.getLogger("watcher.bypass")


@dataclass
class Episode:
    since_ts: float
    raised_ts: float | None = None
    worst_s: float = 0.0
    error: str = ""
    sends: list[tuple[float, str, bool, str]] = field(default_factory=list)  # (at, channel, ok, result)


class StorageBypass:
    def __init__(self, config):
        self.config = config
        self.rule = next((r for r in config.alerting.rules if r.metric == "commit_failing_s"), None)
        self.episode: Episode | None = None
        self._next_send_s = 0.0
        self._lock = threading.Lock()
        self._sender: threading.Thread | None = None

    def failing(self, since_ts: float, now_ts: float, error: str) -> None:
        """Called by the writer after each failed commit."""
        if self.rule is None:
            return
        with self._lock:
            if self.episode is None or self.episode.since_ts != since_ts:
                self.episode = Episode(since_ts)
                self._next_send_s = since_ts + self.rule.threshold
            ep = self.episode
            ep.worst_s, ep.error = max(ep.worst_s, now_ts - since_ts), error
            if now_ts < self._next_send_s or (self._sender is not None and self._sender.is_alive()):
                return
            repeat = ep.raised_ts is not None
            ep.raised_ts = ep.raised_ts or now_ts
            self._next_send_s = now_ts + self.config.alerting.repeat_s
        self._sender = threading.Thread(target=self._send, args=(ep, now_ts, repeat), name="bypass", daemon=True)
        self._sender.start()

    def recovered(self) -> Episode | None:
        """The episode that just ended, if anything was raised for it (to be recorded)."""
        with self._lock:
            ep, self.episode = self.episode, None
        if ep is not None and self._sender is not None:
            self._sender.join(60.0)
        return ep if ep is not None and ep.raised_ts is not None else None

    def _send(self, ep: Episode, now_ts: float, repeat: bool) -> None:
        rule = self.rule
        tags = ["alerts", rule.severity, "zone:service"]
        site = self.config.sites[0] if self.config.sites else None
        title, body = messages.storage_bypass(
            rule, ep.since_ts, now_ts, ep.error, self._tz(), repeat, (site.name or site.id) if site else ""
        )
        try:
            notifier = Notifier(list(self.config.channels))
        except Exception as exc:
            log.error("storage alert could not be sent (channels unusable): %s", exc)
            return
        for name in route(list(self.config.channels), tags):
            if name is None:
                log.error("storage alert: no channel carries %s; nobody was told", ", ".join(tags))
                continue
            d = notifier.send(name, title, body, level=messages.level("raise", rule.severity))
            ep.sends.append((now_ts, name, d.ok, d.result))
            (log.warning if d.ok else log.error)("storage alert sent around the database to %s: %s", name, d.result)

    def _tz(self) -> str:
        return self.config.sites[0].timezone if self.config.sites else "UTC"
