"""Readings whose time disagrees with the service clock: held, then re-admitted or, after
`[ingest] hold_days`, recorded as rejections.

A reading stamped more than `future_skew_s` ahead of the service clock, or more than
`past_limit_days` behind it, says one of the two clocks is wrong, and the service cannot tell
which. Dropping it would lose a correct reading whenever the service clock is the wrong one (an
hour slow after a bad NTP step, a year ahead after a dead RTC battery), and it has already been
acknowledged. So it is stored in `held` with its reason and tried again every minute with the
clock of that moment: once the clocks agree it goes through the normal path (as a late reading
if its zone has moved on); a reading that never fits becomes a rejection that says so. On a
record several central watchers share, a held message none of this watcher's subscriptions
match is another watcher's to decide, until its hold has run out.
"""

from __future__ import annotations

import logging

from watcher.engine.batch import BatchResult, Engine
from watcher.engine.route import filter_matches, topic_filters
from watcher.ingest.message import Message
from watcher.ingest.payload import OutOfClock, Rejected

log = logging.getLogger("watcher.held")
READMIT_BATCH = 5000


def readmit(engine: Engine, now_ts: float) -> BatchResult:
    """Try the held readings against the clock now; admit, keep or expire each. One transaction."""
    result = BatchResult()
    hold_s = engine.config.ingest.hold_days * 86400.0
    admit: list[Message] = []
    done: list[int] = []
    expired: list[tuple] = []
    filters = topic_filters(engine.config)
    for row_id, received_ts, topic, payload, reason in engine.store.held.oldest(READMIT_BATCH):
        within = abs(now_ts - received_ts) < hold_s
        if within and not any(filter_matches(f, topic) for f in filters):
            continue  # another watcher's, on a record several share (docs/fleet.md): it decides
        msg = Message(topic, bytes(payload), now_ts)
        try:
            engine.parse(msg)
        except OutOfClock:
            if now_ts - received_ts >= hold_s or received_ts - now_ts >= hold_s:
                expired.append(
                    (
                        received_ts,
                        topic,
                        payload,
                        f"{reason}; held {engine.config.ingest.hold_days:g} days and the clocks never agreed",
                    )
                )
                done.append(row_id)
            continue
        except Rejected as exc:  # the configuration changed meanwhile (a zone removed, ...)
            expired.append((received_ts, topic, payload, f"{exc} (when re-admitted after being held: {reason})"))
            done.append(row_id)
            continue
        admit.append(msg)
        done.append(row_id)
    if not done:
        return result
    try:
        with engine.store.atomic():
            for received_ts, topic, payload, reason in expired:
                engine.store.rejections.add(received_ts, topic, reason, bytes(payload))
            engine.store.held.remove(done)
            if admit:
                result = engine.process(admit, now_ts)
    except Exception:
        engine.held_count = engine.store.record.count("held")
        engine.reload_all()
        raise
    engine.held_count = max(0, engine.held_count - len(done))
    result.counts["readmitted"] += len(admit)
    result.counts["rejected"] += len(expired)
    result.rejections["held_expired"] += len(expired)
    if admit or expired:
        log.warning(
            "held readings: %d re-admitted now that the clocks agree, %d recorded as rejections, %d still held",
            len(admit),
            len(expired),
            engine.held_count,
        )
    return result
