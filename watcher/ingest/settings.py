"""The broker settings, in ingest's own module: the MQTT network process imports this and
paho only (not the configuration reader, the model or numpy), so it starts light.
watcher.config fills them from the TOML file."""

from __future__ import annotations

from dataclasses import dataclass, field


@dataclass(frozen=True)
class Tls:
    ca_file: str
    cert_file: str | None = None
    key_file: str | None = None


@dataclass(frozen=True)
class Broker:
    host: str = "127.0.0.1"
    port: int = 1883
    client_id: str = "watcher"
    keepalive_s: int = 30
    username: str | None = None
    password: str | None = field(default=None, repr=False)
    session_expiry_s: int = 7 * 86400
    receive_maximum: int = 1000
    status_topic: str = "watcher/status"
    ack_topic: str = "watcher/ack"
    lot_topic: str = "watcher/lots"
    reconnect_min_s: float = 1.0
    reconnect_max_s: float = 60.0
    tls: Tls | None = None
