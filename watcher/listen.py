"""`watcher listen`: what the live topics would become, before going live. Subscribes on a
clean, separate session for a while and shows, for each message, the reading it would be
stored as or the reason it would be refused. Stores nothing and acknowledges nothing the
service would miss: the service's own persistent session keeps its queue."""

from __future__ import annotations

import os
from collections.abc import Callable

from watcher.config import Config
from watcher.engine.route import is_birth, is_command, readings_of, topic_filters
from watcher.ingest import sparkplug
from watcher.ingest.message import Message
from watcher.ingest.mqtt import peek
from watcher.ingest.payload import OutOfClock, Reading, Rejected

SIGNAL_WORDS = {"air_c": "air", "product_c": "product probe", "door": "door", "defrost": "defrost"}
SWITCH_WORDS = {"door": ("closed", "open"), "defrost": ("off", "on")}


def verdict(config: Config, msg: Message, aliases=None) -> list[tuple[str, Reading | None, str]]:
    """For one message: ("reading", reading, "") for each reading it becomes, or one
    ("held" | "refused" | "command" | "birth", None, why); a Sparkplug birth teaches `aliases`
    its metric names."""
    if is_command(config, msg.topic):
        return [("command", None, "an acknowledgement or lot event: the running service acts on it")]
    if is_birth(config, msg.topic):
        try:
            learnt = aliases.learn(msg.topic, sparkplug.decode(msg.payload)) if aliases is not None else None
        except Rejected as exc:
            return [("refused", None, f"Sparkplug birth: {exc}")]
        n = len(learnt[1]) if learnt else 0
        return [("birth", None, f"a Sparkplug birth certificate naming {n} aliased metric(s)")]
    try:
        readings = readings_of(config, msg, lambda zone: config.zone(zone) is not None, aliases)
    except OutOfClock as exc:
        return [("held", None, f"{exc} (the service would hold it until the clocks agree)")]
    except Rejected as exc:
        return [("refused", None, str(exc))]
    return [("reading", r, "") for r in readings]


def listen(
    config: Config, seconds: float, show: Callable[[Message, str, Reading | None, str], None], on_ready=None
) -> int:
    """Watch every topic the service subscribes to for `seconds`; show(message, kind, reading,
    why) for each; on_ready() once subscribed. Returns how many messages were seen."""

    aliases = sparkplug.AliasBook()

    def handle(topic: str, payload: bytes, received_ts: float, retain: bool) -> None:
        msg = Message(topic, payload, received_ts, retain=retain)
        for kind, reading, why in verdict(config, msg, aliases):
            show(msg, kind, reading, why)

    client_id = f"{config.broker.client_id}-listen-{os.getpid()}"
    return peek(config.broker, topic_filters(config), seconds, handle, client_id, on_ready)
