"""A real mosquitto broker for tests: loopback only, free ports, password file, TLS listener
with a CA made in the test, persistence on. Never a mock, never the system broker."""

from __future__ import annotations

import datetime as dt
import ipaddress
import os
import shutil
import signal
import socket
import subprocess
import time
from pathlib import Path

MOSQUITTO = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
MOSQUITTO_PASSWD = shutil.which("mosquitto_passwd") or "/usr/bin/mosquitto_passwd"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def make_ca(folder: Path, clients: tuple[str, ...] = ()) -> dict[str, Path]:
    """A test CA, a server certificate for localhost/127.0.0.1 and a client certificate; and
    one more client certificate for each name in `clients` (its common name; files
    <name>.pem and <name>.key, keys "<name>_cert" and "<name>_key")."""
    from cryptography import x509
    from cryptography.hazmat.primitives import hashes, serialization
    from cryptography.hazmat.primitives.asymmetric import ec
    from cryptography.x509.oid import NameOID

    now = dt.datetime.now(dt.UTC)

    def key():
        return ec.generate_private_key(ec.SECP256R1())

    def write_key(k, path):
        path.write_bytes(
            k.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8, serialization.NoEncryption())
        )

    ca_key = key()
    ca_name = x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, "watcher test CA")])
    ca = (
        x509.CertificateBuilder()
        .subject_name(ca_name)
        .issuer_name(ca_name)
        .public_key(ca_key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(now - dt.timedelta(days=1))
        .not_valid_after(now + dt.timedelta(days=30))
        .add_extension(x509.BasicConstraints(ca=True, path_length=None), critical=True)
        .sign(ca_key, hashes.SHA256())
    )
    out = {"ca": folder / "ca.pem"}
    out["ca"].write_bytes(ca.public_bytes(serialization.Encoding.PEM))
    for name, sans in (
        ("server", [x509.DNSName("localhost"), x509.IPAddress(ipaddress.ip_address("127.0.0.1"))]),
        ("client", None),
        *((c, None) for c in clients),
    ):
        k = key()
        b = (
            x509.CertificateBuilder()
            .subject_name(
                x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, name if name in clients else f"watcher-{name}")])
            )
            .issuer_name(ca_name)
            .public_key(k.public_key())
            .serial_number(x509.random_serial_number())
            .not_valid_before(now - dt.timedelta(days=1))
            .not_valid_after(now + dt.timedelta(days=30))
        )
        if sans:
            b = b.add_extension(x509.SubjectAlternativeName(sans), critical=False)
        cert = b.sign(ca_key, hashes.SHA256())
        out[f"{name}_cert"] = folder / f"{name}.pem"
        out[f"{name}_key"] = folder / f"{name}.key"
        out[f"{name}_cert"].write_bytes(cert.public_bytes(serialization.Encoding.PEM))
        write_key(k, out[f"{name}_key"])
    return out


def wait_listening(proc: subprocess.Popen, port: int, log=lambda: "", timeout: float = 10.0) -> None:
    """Return once the broker process accepts connections on port (a positive signal, not a
    pause); raise with its own words if it exits or never listens."""
    deadline = time.time() + timeout
    while time.time() < deadline:
        if proc.poll() is not None:
            err = proc.stderr.read().decode() if proc.stderr else ""
            raise RuntimeError(f"mosquitto exited: {err} {log()}")
        try:
            with socket.create_connection(("127.0.0.1", port), timeout=0.2):
                return
        except OSError:
            time.sleep(0.05)
    raise RuntimeError("mosquitto did not start: " + log())


class Broker:
    """mosquitto with a plain listener (password required) and a TLS listener."""

    USER, PASSWORD = "watcher", "s3cret-for-tests"

    def __init__(self, folder: Path):
        self.folder = folder
        self.port = free_port()
        self.tls_port = free_port()
        self.tls = make_ca(folder)
        (folder / "persist").mkdir(exist_ok=True)
        self.passwd = folder / "passwd"
        subprocess.run(
            [MOSQUITTO_PASSWD, "-c", "-b", str(self.passwd), self.USER, self.PASSWORD], check=True, capture_output=True
        )
        subprocess.run(
            [MOSQUITTO_PASSWD, "-b", str(self.passwd), "sensor", "sensor-pw"], check=True, capture_output=True
        )
        self.conf = folder / "mosquitto.conf"
        self.conf.write_text(
            f"""user root
per_listener_settings false
allow_anonymous false
password_file {self.passwd}
persistence true
persistence_location {folder / "persist"}/
autosave_interval 1
max_queued_messages 1000000
max_inflight_messages 20000
log_dest file {folder / "mosquitto.log"}
listener {self.port} 127.0.0.1
listener {self.tls_port} 127.0.0.1
cafile {self.tls["ca"]}
certfile {self.tls["server_cert"]}
keyfile {self.tls["server_key"]}
"""
        )
        self.proc: subprocess.Popen | None = None
        (folder / "watcher-password").write_text(self.PASSWORD + "\n")
        os.chmod(folder / "watcher-password", 0o600)

    def start(self) -> None:
        """Start mosquitto; if a port it was given was taken meanwhile (free_port only found it
        free a moment before), move both listeners to fresh ports and try again."""
        for attempt in range(3):
            self.proc = subprocess.Popen(
                [MOSQUITTO, "-c", str(self.conf)], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE
            )
            try:
                wait_listening(self.proc, self.port, self.log)
                return
            except RuntimeError as exc:
                self._close()
                if "Address already in use" not in str(exc) or attempt == 2:
                    raise
            text = self.conf.read_text()
            text = text.replace(f"listener {self.port} 127.0.0.1", "listener @PLAIN@ 127.0.0.1")
            text = text.replace(f"listener {self.tls_port} 127.0.0.1", "listener @TLS@ 127.0.0.1")
            self.port, self.tls_port = free_port(), free_port()
            self.conf.write_text(text.replace("@PLAIN@", str(self.port)).replace("@TLS@", str(self.tls_port)))

    def log(self) -> str:
        path = self.folder / "mosquitto.log"
        return path.read_text()[-3000:] if path.exists() else ""

    def stop(self) -> None:
        if self.proc and self.proc.poll() is None:
            self.proc.terminate()  # saves persistence
            self.proc.wait(10)
        self._close()

    def kill(self) -> None:
        if self.proc and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGKILL)
            self.proc.wait(10)
        self._close()

    def _close(self) -> None:
        if self.proc and self.proc.stderr and not self.proc.stderr.closed:
            self.proc.stderr.close()
