"""What the service says to systemd and journald: sd_notify datagrams (READY, WATCHDOG,
STATUS, STOPPING) and one structured log line per event on stdout."""

from __future__ import annotations

import logging
import os
import socket

log = logging.getLogger("watcher.service")


def sd_notify(message: str) -> bool:
    """Send one datagram to $NOTIFY_SOCKET (systemd Type=notify); False when there is none."""
    addr = os.environ.get("NOTIFY_SOCKET")
    if not addr:
        return False
    if addr.startswith("@"):
        addr = "\0" + addr[1:]
    try:
        with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM) as sock:
            sock.setblocking(False)  # a receiver that stops reading must not freeze the main thread
            sock.connect(addr)
            sock.sendall(message.encode())
        return True
    except BlockingIOError:
        log.warning("sd_notify: the notify socket is full; %s not sent", message)
        return False
    except OSError as exc:
        log.warning("sd_notify failed: %s", exc)
        return False


def setup_logging(level: str = "INFO") -> None:
    """One structured line per event on stdout, for journald."""
    logging.basicConfig(
        level=getattr(logging, level.upper(), logging.INFO),
        format="%(asctime)s level=%(levelname)s logger=%(name)s %(message)s",
        datefmt="%Y-%m-%dT%H:%M:%S%z",
        force=True,
    )
