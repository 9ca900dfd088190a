"""The MQTT edge: the only module that imports paho-mqtt.

MQTT 5 with a persistent session (clean_start false, a session expiry, a stable client id),
QoS 1 subscriptions made again on every connect, and manual acknowledgement: a message is
acked only when the writer says its reading (or rejection) is committed. Callbacks only put
(topic, payload, received_ts, mid, qos) tuples on a queue and never raise. It runs inside the
network process (watcher.ingest.mqtt_process). Reconnects use capped exponential backoff with full jitter,
run by our own network thread, so a TLS rejection surfaces as a clear logged error instead of
a silent loop. A retained online/offline status with a Last Will on the same topic.
"""

from __future__ import annotations

import collections
import logging
import random
import ssl
import threading
import time

import paho.mqtt.client as mqtt
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from watcher.ingest.settings import Broker

log = logging.getLogger("watcher.mqtt")


def _client(broker: Broker, client_id: str, manual_ack: bool = False) -> mqtt.Client:
    """An MQTT 5 client with the broker's login and TLS (the certificate always checked)."""
    c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=client_id, protocol=mqtt.MQTTv5, manual_ack=manual_ack)
    if broker.username:
        c.username_pw_set(broker.username, broker.password)
    if broker.tls:
        c.tls_set(
            ca_certs=broker.tls.ca_file,
            certfile=broker.tls.cert_file,
            keyfile=broker.tls.key_file,
            cert_reqs=ssl.CERT_REQUIRED,
            tls_version=ssl.PROTOCOL_TLS_CLIENT,
        )
    return c


class MqttLink:
    def __init__(self, broker: Broker, filters: list[str], inbox: collections.deque, on_state=None):
        self.broker = broker
        self.filters = filters
        self.inbox = inbox
        self.on_state = on_state or (lambda event, detail: None)
        self.connected = threading.Event()
        self.stopping = threading.Event()
        self.last_error: str | None = None
        self.connects = 0
        self.disconnected_since: float | None = time.time()
        self.callback_errors = 0
        self._acks: collections.deque[list[tuple[int, int]]] = collections.deque()
        c = _client(broker, broker.client_id, manual_ack=True)
        c.will_set(broker.status_topic, b"offline", qos=1, retain=True)
        c.on_connect = self._on_connect
        c.on_disconnect = self._on_disconnect
        c.on_message = self._on_message
        self.client = c
        self._thread = threading.Thread(target=self._run, name="mqtt", daemon=True)

    # --- callbacks (network thread): never block, never raise --------------------------------
    def _on_connect(self, client, userdata, flags, reason_code, properties):
        try:
            if reason_code.is_failure:
                self.last_error = f"broker refused the connection: {reason_code}"
                log.error("mqtt: %s", self.last_error)
                return
            client.subscribe([(f, mqtt.SubscribeOptions(qos=1)) for f in self.filters])
            client.publish(self.broker.status_topic, b"online", qos=1, retain=True)
            self.connects += 1
            self.last_error = None
            self.disconnected_since = None
            self.connected.set()
            log.info(
                "mqtt: connected to %s:%s (session present: %s)",
                self.broker.host,
                self.broker.port,
                flags.session_present,
            )
            self.on_state("connected", flags.session_present)
        except Exception:  # a dying callback would silently end the network loop
            self.callback_errors += 1
            log.exception("mqtt: on_connect failed")

    def _on_disconnect(self, client, userdata, flags, reason_code, properties):
        try:
            self.connected.clear()
            self.disconnected_since = self.disconnected_since or time.time()
            if not self.stopping.is_set():
                log.warning("mqtt: disconnected (%s)", reason_code)
                self.on_state("disconnected", str(reason_code))
        except Exception:
            self.callback_errors += 1

    def _on_message(self, client, userdata, msg):
        try:
            self.inbox.append((msg.topic, bytes(msg.payload), time.time(), msg.mid, msg.qos, bool(msg.retain)))
        except Exception:
            self.callback_errors += 1
            log.exception("mqtt: on_message failed")

    # --- network thread ----------------------------------------------------------------------
    def start(self) -> None:
        self._thread.start()

    def alive(self) -> bool:
        return self._thread.is_alive()

    def _connect_properties(self) -> Properties:
        props = Properties(PacketTypes.CONNECT)
        props.SessionExpiryInterval = self.broker.session_expiry_s
        props.ReceiveMaximum = self.broker.receive_maximum
        return props

    def _run(self) -> None:
        delay = self.broker.reconnect_min_s
        first = True
        while not self.stopping.is_set():
            try:
                if first:
                    self.client.connect(
                        self.broker.host,
                        self.broker.port,
                        # paho pings after one keepalive of silence and gives up one keepalive
                        # later; half the setting makes a dead (half-open) link show within it.
                        keepalive=max(2, self.broker.keepalive_s // 2),
                        clean_start=False,
                        properties=self._connect_properties(),
                    )
                    first = False
                else:
                    self.client.reconnect()
                delay = self.broker.reconnect_min_s
                while not self.stopping.is_set():
                    self._send_acks()
                    rc = self.client.loop(timeout=0.01)
                    if rc != mqtt.MQTT_ERR_SUCCESS:
                        break
            except ssl.SSLError as exc:
                why = getattr(exc, "verify_message", None) or exc.reason or str(exc)
                self.last_error = f"TLS handshake with {self.broker.host}:{self.broker.port} failed: {why}"
                log.error(
                    "mqtt: %s (the broker's certificate must be signed by ca_file and name host; check the client "
                    "certificate and key too)",
                    self.last_error,
                )
            except (ConnectionResetError, BrokenPipeError) as exc:
                self.last_error = f"cannot reach {self.broker.host}:{self.broker.port}: {exc}"
                if self.broker.tls:  # never retried in plain text
                    self.last_error = (
                        f"TLS handshake with {self.broker.host}:{self.broker.port} failed: the broker closed the "
                        "connection (is this port a plain-text listener?)"
                    )
                log.error("mqtt: %s", self.last_error)
            except (OSError, mqtt.WebsocketConnectionError, ValueError) as exc:
                self.last_error = f"cannot reach {self.broker.host}:{self.broker.port}: {exc}"
                log.warning("mqtt: %s", self.last_error)
            except Exception:  # keep the thread alive whatever paho raises
                self.callback_errors += 1
                log.exception("mqtt: network loop error")
            self.connected.clear()
            self.disconnected_since = self.disconnected_since or time.time()
            if self.stopping.is_set():
                break
            sleep = random.uniform(0.0, delay)  # full jitter
            delay = min(self.broker.reconnect_max_s, delay * 2.0)
            self.stopping.wait(sleep)

    # --- writer thread -----------------------------------------------------------------------
    def ack(self, pairs: list[tuple[int, int]]) -> None:
        """Hand (mid, qos) pairs of committed messages over for acknowledgement. The network
        thread sends the PUBACKs in arrival order, so every paho call stays on that thread."""
        self._acks.append(pairs)

    def _send_acks(self) -> None:
        ack = self.client.ack
        while self._acks:
            for mid, qos in self._acks.popleft():
                ack(mid, qos)

    def stop(self, timeout_s: float = 5.0) -> None:
        """Publish the retained offline status ourselves (a clean disconnect sends no Will),
        wait for it to go out, then disconnect and end the network thread."""
        if self.connected.is_set():
            info = self.client.publish(self.broker.status_topic, b"offline", qos=1, retain=True)
            deadline = time.time() + timeout_s
            while not info.is_published() and time.time() < deadline and self._thread.is_alive():
                time.sleep(0.01)
            self.client.disconnect()
            deadline = time.time() + 1.0
            while self.connected.is_set() and time.time() < deadline:
                time.sleep(0.01)
        self.stopping.set()
        self._thread.join(timeout_s)

    def resubscribe(self, filters: list[str]) -> None:
        """Switch to a new set of subscription filters (after a configuration reload)."""
        old = set(self.filters)
        self.filters = list(filters)
        if self.connected.is_set():
            gone = sorted(old - set(filters))
            if gone:
                self.client.unsubscribe(gone)
            self.client.subscribe([(f, mqtt.SubscribeOptions(qos=1)) for f in self.filters])


def peek(broker: Broker, filters: list[str], seconds: float, handle, client_id: str, on_ready=None) -> int:
    """Watch the topics for `seconds` on a clean, separate session (its own client id, no
    status, no will, nothing kept at the broker afterwards) and call handle(topic, payload,
    received_ts, retain) in arrival order from this thread; on_ready() once subscribed.
    Returns the messages seen; raises ConnectionError when the broker cannot be reached or
    refuses the login."""
    inbox: collections.deque = collections.deque()
    refused: list[str] = []
    subscribed = threading.Event()
    c = _client(broker, client_id)

    def on_connect(client, userdata, flags, reason_code, properties):
        if reason_code.is_failure:
            refused.append(str(reason_code))
            return
        client.subscribe([(f, mqtt.SubscribeOptions(qos=1)) for f in filters])

    c.on_connect = on_connect
    c.on_subscribe = lambda client, userdata, mid, reason_codes, properties: subscribed.set()
    c.on_message = lambda client, userdata, msg: inbox.append(
        (msg.topic, bytes(msg.payload), time.time(), bool(msg.retain))
    )
    try:
        c.connect(broker.host, broker.port, keepalive=max(2, broker.keepalive_s // 2), clean_start=True)
    except (OSError, ssl.SSLError) as exc:
        raise ConnectionError(f"cannot reach the broker at {broker.host}:{broker.port} ({exc})") from None
    c.loop_start()
    seen = 0
    try:
        deadline = time.monotonic() + seconds
        while time.monotonic() < deadline and not refused:
            if on_ready is not None and subscribed.is_set():
                on_ready()
                on_ready = None
            while inbox:
                handle(*inbox.popleft())
                seen += 1
            time.sleep(0.05)
        while inbox:
            handle(*inbox.popleft())
            seen += 1
    finally:
        c.disconnect()
        c.loop_stop()
    if refused:
        raise ConnectionError(f"the broker at {broker.host}:{broker.port} refused the connection: {refused[0]}")
    return seen
