"""The MQTT edge in its own process, so paho's per-message work and the writer's do not share
one interpreter lock (on 2 cores that roughly doubles durable throughput).

Parent side: ``MqttProcess`` has the same surface as ``MqttLink`` (start, alive, ack, stop,
resubscribe, connected, last_error, connects). Child side: ``_child_main`` runs an
``MqttLink`` and relays over one duplex pipe:

    child -> parent: ("msgs", [(topic, payload, received_ts, mid, qos, retain), ...])
                     ("state", {"connected": bool, "last_error": str|None, "connects": int, ...})
    parent -> child: ("ack", [(mid, qos), ...]) | ("subscribe", [filters]) | ("stop", None)

Acknowledgements still go out only after the parent's commit, in arrival order, from the
child's network thread. The child exits when the pipe closes, so a parent killed with
SIGKILL leaves no orphan holding the client id.
"""

from __future__ import annotations

import atexit
import collections
import logging
import multiprocessing as mp
import threading
import time

from watcher.ingest.message import Message
from watcher.ingest.settings import Broker

log = logging.getLogger("watcher.mqtt")
_RELAY_EVERY_S = 0.005
_RELAY_MAX = 2000


def _child_main(broker: Broker, filters: list[str], conn, log_level: int) -> None:
    import ctypes
    import signal

    from watcher.ingest.mqtt import MqttLink

    logging.basicConfig(
        level=log_level,
        format="%(asctime)s level=%(levelname)s logger=%(name)s %(message)s",
        datefmt="%Y-%m-%dT%H:%M:%S%z",
        force=True,
    )
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # the parent decides when to stop
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    try:  # die with the parent even if the pipe close is missed (Linux prctl PR_SET_PDEATHSIG)
        ctypes.CDLL(None).prctl(1, signal.SIGKILL)
    except (OSError, AttributeError):
        pass
    inbox: collections.deque = collections.deque()
    link = MqttLink(broker, filters, inbox)
    send_lock = threading.Lock()
    stop = threading.Event()

    def relay() -> None:
        last_state = None
        while not stop.is_set():
            batch = []
            while inbox and len(batch) < _RELAY_MAX:
                batch.append(inbox.popleft())
            state = {
                "connected": link.connected.is_set(),
                "last_error": link.last_error,
                "connects": link.connects,
                "callback_errors": link.callback_errors,
                "alive": link.alive(),
            }
            try:
                with send_lock:
                    if batch:
                        conn.send(("msgs", batch))
                    if state != last_state:
                        conn.send(("state", state))
                        last_state = state
            except (BrokenPipeError, EOFError, OSError):
                stop.set()
                return
            if not batch:
                time.sleep(_RELAY_EVERY_S)

    relay_thread = threading.Thread(target=relay, name="relay", daemon=True)
    link.start()
    relay_thread.start()
    try:
        while True:
            kind, body = conn.recv()
            if kind == "ack":
                link.ack(body)
            elif kind == "subscribe":
                link.resubscribe(body)
            elif kind == "stop":
                break
    except (EOFError, OSError):
        pass  # the parent is gone
    stop.set()
    relay_thread.join(2.0)
    link.stop()
    try:
        with send_lock:
            conn.send(("stopped", None))
    except (BrokenPipeError, EOFError, OSError):
        pass


class MqttProcess:
    def __init__(self, broker: Broker, filters: list[str], inbox: collections.deque, on_state=None):
        self.broker = broker
        self.filters = list(filters)
        self.inbox = inbox
        self.on_state = on_state or (lambda event, detail: None)
        self.connected = threading.Event()
        self.last_error: str | None = None
        self.connects = 0
        self.callback_errors = 0
        ctx = mp.get_context("spawn")
        self._conn, child_conn = ctx.Pipe(duplex=True)
        self._proc = ctx.Process(
            target=_child_main,
            args=(broker, self.filters, child_conn, logging.getLogger().level),
            name="watcher-mqtt",
            daemon=True,
        )
        self._child_conn = child_conn
        self._send_lock = threading.Lock()
        self._reader = threading.Thread(target=self._read, name="mqtt-relay", daemon=True)
        self._stopped = threading.Event()

    def start(self) -> None:
        self._proc.start()
        self._child_conn.close()
        self._reader.start()
        # On every way out of the parent, the child goes too. multiprocessing's own exit hook
        # would send SIGTERM, which the child ignores (it drains on the parent's word), and
        # then wait for ever; atexit runs hooks last-registered first, so this one comes first.
        atexit.register(self._kill_if_alive)

    def _kill_if_alive(self) -> None:
        if self._proc.is_alive():
            self._proc.kill()
            self._proc.join(5.0)

    def alive(self) -> bool:
        return self._proc.is_alive() and self._reader.is_alive()

    def _read(self) -> None:
        try:
            while True:
                kind, body = self._conn.recv()
                if kind == "msgs":
                    self.inbox.extend(Message(t, p, r, mid, qos, ret) for t, p, r, mid, qos, ret in body)
                elif kind == "state":
                    was = self.connected.is_set()
                    self.last_error = body["last_error"]
                    self.callback_errors = body["callback_errors"]
                    if body["connects"] > self.connects:
                        for _ in range(body["connects"] - self.connects):
                            self.on_state("connected", None)
                        self.connects = body["connects"]
                    if body["connected"]:
                        self.connected.set()
                    else:
                        self.connected.clear()
                        if was:
                            self.on_state("disconnected", None)
                elif kind == "stopped":
                    break
        except (EOFError, OSError):
            pass
        self.connected.clear()
        self._stopped.set()

    def _send(self, item) -> None:
        try:
            with self._send_lock:
                self._conn.send(item)
        except (BrokenPipeError, OSError):
            log.error("mqtt: the network process is gone")

    def ack(self, messages: list[Message]) -> None:
        """Acknowledge committed messages (sent to the network process, acked in order there)."""
        self._send(("ack", [(m.mid, m.qos) for m in messages if m.qos > 0]))

    def resubscribe(self, filters: list[str]) -> None:
        self.filters = list(filters)
        self._send(("subscribe", self.filters))

    def stop(self, timeout_s: float = 10.0) -> None:
        if self._proc.is_alive():
            self._send(("stop", None))
            self._stopped.wait(timeout_s)
            self._proc.join(timeout_s)
        if self._proc.is_alive():
            self._proc.kill()
        self._conn.close()
