"""Notification channels and tag routing: plain data, no apprise (imported by the configuration,
which the MQTT network process loads too)."""

from __future__ import annotations

from dataclasses import dataclass, field


@dataclass(frozen=True)
class Channel:
    name: str
    url: str = field(repr=False)
    tags: tuple[str, ...] = ("alerts",)
    min_interval_s: float | None = None  # None: apprise's own spacing for the service (about 5.5 s)


def route(channels: list[Channel], tags: list[str], exclude: set[str] = frozenset()) -> list[str | None]:
    """Names of the channels that carry any of `tags` ("all" reaches every channel), minus
    `exclude`; [None] when none does, so the message is still recorded (as unrouted)."""
    wanted = set(tags)
    names = [c.name for c in channels if c.name not in exclude and ("all" in wanted or wanted & set(c.tags))]
    return names or [None]
