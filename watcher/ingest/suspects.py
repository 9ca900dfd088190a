"""Messages that may stop the service: what the writer had in hand when the process died.

Before each batch the writer writes the fingerprints of its messages to a small file beside the
database and empties it after the commit. A file left non-empty at start-up means the last
process died while handling those messages (a crash, the OOM killer, a hang the watchdog
ended); each of them becomes a suspect with a count of starts it has failed. The broker sends
them again (they were never acknowledged), and the writer handles them carefully: a suspect
that failed once is retried with its batch-mates, one that failed twice alone, and one that
failed ``SET_ASIDE_AFTER`` starts in a row is set aside: stored as a rejection with its reason
and acknowledged, so a single message can never keep a site down.

A process kill does not need fsync for this (the page cache outlives the process), so the
file costs one write per batch.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os

from watcher.ingest.message import Message

log = logging.getLogger("watcher.suspects")
SET_ASIDE_AFTER = 3


def fingerprint(msg: Message) -> str:
    return hashlib.blake2b(
        msg.topic.encode("utf-8", "backslashreplace") + b"\0" + msg.payload, digest_size=8
    ).hexdigest()


class Suspects:
    def __init__(self, path: str):
        self.path = path
        self.counts: dict[str, int] = {}
        try:
            with open(path, encoding="utf-8") as f:
                doc = json.load(f)
            self.counts = {str(k): int(v) for k, v in doc.get("suspects", {}).items()}
            for fp in doc.get("in_hand", []):
                self.counts[fp] = self.counts.get(fp, 0) + 1
        except FileNotFoundError:
            pass
        except (OSError, ValueError, AttributeError, TypeError) as exc:
            log.warning("%s: unreadable (%s); starting without suspects", path, exc)
        if self.counts:
            log.warning(
                "the last process stopped while handling %d message(s); they are handled one by one "
                "and set aside after %d failed starts",
                len(self.counts),
                SET_ASIDE_AFTER,
            )
        self._write([])

    def _write(self, in_hand: list[str]) -> None:
        data = json.dumps({"in_hand": in_hand, "suspects": self.counts}).encode()
        fd = os.open(self.path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
        try:
            os.write(fd, data)
        finally:
            os.close(fd)

    def failed_starts(self, msg: Message) -> int:
        return self.counts.get(fingerprint(msg), 0) if self.counts else 0

    def holding(self, batch: list[Message]) -> None:
        """Before handling a batch."""
        self._write([fingerprint(m) for m in batch])

    def done(self, batch: list[Message]) -> None:
        """After the batch is committed (or set aside): its messages are no longer suspects."""
        if self.counts:
            for m in batch:
                self.counts.pop(fingerprint(m), None)
        self._write([])
