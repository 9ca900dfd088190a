"""The broker settings, in ingest's own module: the MQTT network process imports this and
paho only (not the configuration reader, the model or numpy), so it starts light.
watcher.config fills them from the TOML file."""

from __future__ import annotations

from dataclasses import dataclass, field

from watcher.declare import setting


@dataclass(frozen=True)
class Tls:
    ca_file: str = setting(doc="the CA that signed the broker's certificate (leave the whole table out for plain MQTT)")
    cert_file: str | None = setting(None, "client certificate, with key_file or not at all")
    key_file: str | None = setting(None, "the client certificate's key")


@dataclass(frozen=True)
class Broker:
    host: str = setting("127.0.0.1", "the site broker")
    port: int = setting(1883, "1883 plain, 8883 usually TLS", lo=1, hi=65535)
    client_id: str = setting("watcher", "stable and unique: the broker keeps this client's queue")
    keepalive_s: int = setting(
        30, "a dead or silently stalled link is noticed within this (watcher pings every half of it)", lo=5, hi=3600
    )
    username: str | None = setting(None, "the broker user")
    password: str | None = field(default=None, repr=False)  # from password_file or _credential, never the file
    session_expiry_s: int = setting(
        7 * 86400, "how long the broker queues readings while watcher is down", lo=60, hi=2**32 - 1
    )
    receive_maximum: int = setting(1000, "unacknowledged messages the broker may send at once", lo=1, hi=65535)
    status_topic: str = setting("watcher/status", 'retained "online"/"offline", with a Last Will')
    ack_topic: str = setting("watcher/ack", "acknowledgement commands")
    lot_topic: str = setting("watcher/lots", "lot events from warehouse systems: arrive, move, depart (docs/lots.md)")
    reconnect_min_s: float = setting(
        1.0, "reconnect backoff: doubles from min to max, with full jitter", lo=0.05, hi=600
    )
    reconnect_max_s: float = setting(60.0, "the longest wait between reconnect attempts", lo=0.05, hi=3600)
    tls: Tls | None = None
