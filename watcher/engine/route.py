"""Which source a message belongs to and the reading it becomes: the one reading of a message,
used by the engine (which stores it) and by `watcher listen` (which only shows it)."""

from __future__ import annotations

from collections.abc import Callable

from watcher.config import Config
from watcher.ingest.message import Message
from watcher.ingest.payload import Reading, Rejected, parse_message


def reading_of(config: Config, msg: Message, known_zone: Callable[[str], bool]) -> Reading:
    """The reading a message becomes, or Rejected with the reason (OutOfClock, a Rejected, when
    its time disagrees with the receive time)."""
    for source in config.sources:
        names = source.pattern.match(msg.topic)
        if names is None:
            continue
        if msg.retain and source.time_path is None:
            raise Rejected(
                "retained message on a source stamped with the receive time: it is replayed at every "
                "reconnect and would make a dead sensor look alive (publish without retain, or add a time field)"
            )
        reading = parse_message(source, names, msg.payload, msg.received_ts, config.ingest.limits)
        if not known_zone(reading.zone):
            raise Rejected(f"unknown zone {reading.zone[:64]!r}")
        return reading
    raise Rejected("no source pattern matches the topic")


def command_topics(config: Config) -> tuple[str, str]:
    """The acknowledgement and lot-event topics (each also with /<user> below it)."""
    return config.broker.ack_topic, config.broker.lot_topic


def is_command(config: Config, topic: str) -> bool:
    return any(topic == c or topic.startswith(c + "/") for c in command_topics(config))


def topic_filters(config: Config) -> list[str]:
    """Every filter the service subscribes to: the sources' and the command topics'."""
    ack, lots = command_topics(config)
    return sorted({s.pattern.filter for s in config.sources} | {ack, ack + "/+", lots, lots + "/+"})
