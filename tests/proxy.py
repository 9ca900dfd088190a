"""A TCP proxy on loopback between watcher and the broker, steered by the test: pass traffic,
drop every connection, stall them silently (a half-open link: sockets stay open, nothing moves),
or slow them down. Real sockets, real bytes; the broker and watcher do not know it is there."""

from __future__ import annotations

import select
import socket
import threading
import time

from tests.broker import free_port


class Proxy:
    def __init__(self, target_port: int):
        self.target_port = target_port
        self.port = free_port()
        self.mode = "pass"  # pass | stall | slow
        self.delay_s = 0.0  # per chunk, in "slow" mode
        self.accepted = 0
        self._pairs: list[tuple[socket.socket, socket.socket]] = []
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._server = socket.create_server(("127.0.0.1", self.port))
        self._server.settimeout(0.2)
        threading.Thread(target=self._accept, daemon=True).start()

    def _accept(self) -> None:
        while not self._stop.is_set():
            try:
                client, _ = self._server.accept()
            except TimeoutError:
                continue
            except OSError:
                return
            try:
                upstream = socket.create_connection(("127.0.0.1", self.target_port), timeout=5)
            except OSError:
                client.close()
                continue
            with self._lock:
                self._pairs.append((client, upstream))
                self.accepted += 1
            threading.Thread(target=self._pump, args=(client, upstream), daemon=True).start()

    def _pump(self, a: socket.socket, b: socket.socket) -> None:
        peer = {a: b, b: a}
        try:
            while not self._stop.is_set():
                if self.mode == "stall":
                    time.sleep(0.05)  # hold the bytes: neither side hears anything, nobody closes
                    continue
                ready, _, _ = select.select([a, b], [], [], 0.1)
                for s in ready:
                    slow = self.mode == "slow"
                    data = s.recv(4096 if slow else 65536)  # slow: at most 4 KiB per delay
                    if not data:
                        return
                    if slow:
                        time.sleep(self.delay_s)
                    peer[s].sendall(data)
        except (OSError, ValueError):  # a socket closed by drop() under our feet
            return
        finally:
            for s in (a, b):
                try:
                    s.close()
                except OSError:
                    pass

    def drop(self) -> None:
        """Cut every open connection at once (RST-like close on both sides)."""
        with self._lock:
            pairs, self._pairs = self._pairs, []
        for a, b in pairs:
            for s in (a, b):
                try:
                    s.shutdown(socket.SHUT_RDWR)
                    s.close()
                except OSError:
                    pass

    def stall(self) -> None:
        """Freeze the open connections: a half-open link that only a keepalive can detect. New
        connections stall too until `resume`. Returns once every pump has seen it (a pump that
        was waiting in select when the mode changed forwards what that select returned)."""
        self.mode = "stall"
        time.sleep(0.3)  # longer than a pump's select timeout

    def slow(self, delay_s: float) -> None:
        self.delay_s, self.mode = delay_s, "slow"

    def resume(self) -> None:
        """Back to passing traffic; connections frozen by `stall` are cut, as a real dead link
        would be by the time the peers notice."""
        if self.mode == "stall":
            self.drop()
        self.mode = "pass"

    def close(self) -> None:
        self._stop.set()
        self.drop()
        self._server.close()
