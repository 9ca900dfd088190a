"""One MQTT message as the service hands it around (light: the network process imports it)."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Message:
    topic: str
    payload: bytes
    received_ts: float
    mid: int = 0
    qos: int = 0
    retain: bool = False  # a retained message the broker replayed at subscription
