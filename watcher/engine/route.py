"""Which source a message belongs to and the reading it becomes: the one reading of a message,
used by the engine (which stores it) and by `watcher listen` (which only shows it)."""

from __future__ import annotations

from collections.abc import Callable

from watcher.config import Config
from watcher.ingest.message import Message
from watcher.ingest.payload import Reading, Rejected, parse_readings, zone_of


def readings_of(config: Config, msg: Message, known_zone: Callable[[str], bool], aliases=None) -> list[Reading]:
    """The readings a message becomes (one, or a series), or Rejected with the reason
    (OutOfClock, a Rejected, when a time disagrees with the receive time). aliases: the
    Sparkplug births seen so far."""
    for source in config.sources:
        names = source.pattern.match(msg.topic)
        if names is None:
            continue
        if msg.retain and source.time_path is None:
            raise Rejected(
                "retained message on a source stamped with the receive time: it is replayed at every "
                "reconnect and would make a dead sensor look alive (publish without retain, or add a time field)"
            )
        readings = parse_readings(source, names, msg.payload, msg.received_ts, config.ingest.limits, msg.topic, aliases)
        zone = readings[0].zone  # one source, one topic: one zone
        if not known_zone(zone):
            raise Rejected(f"unknown zone {zone[:64]!r}")
        return readings
    raise Rejected("no source pattern matches the topic")


def site_of_topic(config: Config, topic: str) -> str | None:
    """The site whose zone a topic names (by the first source whose pattern matches it); None
    when no source matches or the zone is not configured."""
    for source in config.sources:
        names = source.pattern.match(topic)
        if names is not None:
            zone = config.zone(zone_of(source, names) or "")
            return zone.site if zone is not None else None
    return None


def command_topics(config: Config) -> tuple[str, str]:
    """The acknowledgement and lot-event topics (each also with /<user> below it)."""
    return config.broker.ack_topic, config.broker.lot_topic


def is_command(config: Config, topic: str) -> bool:
    return any(topic == c or topic.startswith(c + "/") for c in command_topics(config))


def birth_filters(config: Config) -> set[str]:
    """The Sparkplug births that name the metrics of the Sparkplug sources' data (a DDATA
    source needs its device's DBIRTH and its node's NBIRTH)."""
    out = set()
    for s in config.sources:
        if s.fmt == "sparkplug":
            levels = s.pattern.filter.split("/")
            out.add("/".join([*levels[:2], "NBIRTH", levels[3]]))
            if len(levels) == 5:
                out.add("/".join([*levels[:2], "DBIRTH", *levels[3:]]))
    return out


def is_birth(config: Config, topic: str, filters: set[str] | None = None) -> bool:
    """A Sparkplug birth a source needs (filters: birth_filters(config), made once by a caller
    that asks often)."""
    return any(filter_matches(f, topic) for f in (birth_filters(config) if filters is None else filters))


def filter_matches(topic_filter: str, topic: str) -> bool:
    """MQTT topic filter matching for the filters watcher makes ('+' whole levels, '#' last)."""
    want, got = topic_filter.split("/"), topic.split("/")
    for i, level in enumerate(want):
        if level == "#":
            return True
        if i >= len(got) or (level != "+" and level != got[i]):
            return False
    return len(want) == len(got)


def topic_filters(config: Config) -> list[str]:
    """Every filter the service subscribes to: the sources', their births' and the command topics'."""
    ack, lots = command_topics(config)
    sources = {s.pattern.filter for s in config.sources} | birth_filters(config)
    return sorted(sources | {ack, ack + "/+", lots, lots + "/+"})
