"""A trial run of suspect messages in a throwaway process (see ingest/suspects.py).

The trial process loads the configuration and the database as the service does and handles
each message alone in a transaction it rolls back, saying before each one which it starts. If
it dies or hangs, the message it had started is the one that stops the service: the parent
sets it aside and runs a new trial for the messages after it. Nothing the trial does is
committed, and it never talks to the broker.
"""

from __future__ import annotations

import logging
import multiprocessing as mp

from watcher.ingest.message import Message

log = logging.getLogger("watcher.trial")
HANG_S = 60.0  # a message the trial has not finished after this long hangs the service


class _Rollback(Exception):
    pass


def _trial_main(config_path: str, items: list[tuple], conn) -> None:
    from watcher.config import load_config
    from watcher.engine.batch import Engine
    from watcher.store.db import Store

    cfg = load_config(config_path)
    store = Store.configured(cfg.storage)
    engine = Engine(cfg, store, checkpoint_s=3600.0)
    for i, (topic, payload, received_ts) in enumerate(items):
        conn.send(("start", i))
        try:
            with store.atomic():
                engine.process([Message(topic, payload, received_ts)], received_ts)
                raise _Rollback
        except _Rollback:
            pass
        except Exception:  # a message that raises is the writer's to split off, not a crash
            pass
        # The engine's memory keeps what was rolled back; that does not matter for finding a
        # message that crashes, and rebuilding it per message (every zone reloaded) would make a
        # start after a kill at a large site take minutes.
    conn.send(("done", None))


def find_breakers(config_path: str, messages: list[Message]) -> dict[int, str]:
    """Index of each message that ends or hangs a trial process -> what happened."""
    ctx = mp.get_context("spawn")
    breakers: dict[int, str] = {}
    first = 0
    while first < len(messages):
        parent, child = ctx.Pipe(duplex=False)
        items = [(m.topic, m.payload, m.received_ts) for m in messages[first:]]
        proc = ctx.Process(target=_trial_main, args=(config_path, items, child), name="watcher-trial", daemon=True)
        proc.start()
        child.close()
        started = None
        outcome = None
        while outcome is None:
            if not parent.poll(HANG_S):
                outcome = f"the trial hung for {HANG_S:.0f} s on it"
                proc.kill()
                break
            try:
                kind, body = parent.recv()
            except EOFError:
                proc.join(10.0)
                outcome = f"the trial process ended with exit code {proc.exitcode}"
                break
            if kind == "start":
                started = body
            elif kind == "done":
                break
        proc.join(10.0)
        parent.close()
        if outcome is None:
            return breakers
        if started is None:  # died before the first message: the trial itself failed
            log.error("trial process failed before any message (%s); handling the suspects as usual", outcome)
            return breakers
        breakers[first + started] = outcome
        first += started + 1
    return breakers
