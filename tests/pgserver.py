"""A real PostgreSQL server for tests: its own data directory in a temporary folder, loopback
only on a free port, run as an unprivileged user (the `postgres` system user when the tests
run as root: the server refuses root), password authentication over TCP. Never a mock, never
the system's cluster. scripts/test.sh installs the Debian package."""

from __future__ import annotations

import glob
import os
import pwd
import shutil
import signal
import subprocess
import tempfile
import time
from pathlib import Path

from tests.broker import free_port


def server_bin() -> Path | None:
    """The newest installed PostgreSQL's bin folder (Debian keeps it off PATH), if any."""
    found = sorted(glob.glob("/usr/lib/postgresql/*/bin/initdb"), key=lambda p: int(Path(p).parts[-3]))
    return Path(found[-1]).parent if found else None


class PostgresServer:
    """initdb, start, a role and a database for watcher (password in a 0600 file), stop."""

    ADMIN = "pgadmin"

    def __init__(self, role: str = "watcher", database: str = "watcher"):
        bin_dir = server_bin()
        if bin_dir is None:
            raise RuntimeError("PostgreSQL is not installed (scripts/test.sh installs it: apt-get install postgresql)")
        self.bin = bin_dir
        self.root = Path(tempfile.mkdtemp(prefix="watcher-pg-"))
        self.data = self.root / "data"
        self.port = free_port()
        self.role, self.database = role, database
        self.password = "pw-" + os.urandom(8).hex()
        self.password_file = self.root / "watcher-password"
        self.password_file.write_text(self.password + "\n")
        self.password_file.chmod(0o600)
        self.user = "postgres" if os.geteuid() == 0 else pwd.getpwuid(os.geteuid()).pw_name
        if os.geteuid() == 0:
            shutil.chown(self.root, self.user)
        self.proc: subprocess.Popen | None = None

    def _user(self) -> dict:
        """Popen's arguments that run a command as the server's user (only root may switch)."""
        if os.geteuid() != 0:
            return {}
        entry = pwd.getpwnam(self.user)
        return {"user": entry.pw_uid, "group": entry.pw_gid, "extra_groups": [], "cwd": str(self.root)}

    def _as_user(self, *cmd: str) -> subprocess.CompletedProcess:
        return subprocess.run(list(cmd), check=True, capture_output=True, text=True, **self._user())

    def start(self) -> None:
        self._as_user(
            str(self.bin / "initdb"),
            "-D",
            str(self.data),
            "-U",
            self.ADMIN,
            "--auth-local=trust",  # the admin, on the server's own socket in its data folder only
            "--auth-host=scram-sha-256",
            "--encoding=UTF8",
            "--no-instructions",
        )
        self.log = self.root / "server.log"
        log_fh = self.log.open("ab")
        self.proc = subprocess.Popen(
            [
                str(self.bin / "postgres"),
                "-D",
                str(self.data),
                "-p",
                str(self.port),
                "-c",
                "listen_addresses=127.0.0.1",
                "-c",
                f"unix_socket_directories={self.data}",
                "-c",
                "synchronous_commit=on",
                "-c",
                "fsync=on",
            ],
            stdout=subprocess.DEVNULL,
            stderr=log_fh,
            **self._user(),
        )
        log_fh.close()  # the server has its own copy
        self._wait_ready()
        self.sql(f"CREATE ROLE {self.role} LOGIN PASSWORD '{self.password}'")
        self.sql(f"CREATE DATABASE {self.database} OWNER {self.role}")

    def _wait_ready(self, timeout: float = 30.0) -> None:
        deadline = time.time() + timeout
        while time.time() < deadline:
            if self.proc is not None and self.proc.poll() is not None:
                raise RuntimeError("postgres exited:\n" + self.log.read_text()[-3000:])
            done = subprocess.run(
                [str(self.bin / "pg_isready"), "-h", "127.0.0.1", "-p", str(self.port)], capture_output=True
            )
            if done.returncode == 0:
                return
            time.sleep(0.1)
        raise RuntimeError("postgres did not start:\n" + self.log.read_text()[-3000:])

    def sql(self, statement: str, database: str = "postgres") -> str:
        """Run one statement as the admin over the server's own socket; its output."""
        done = self._as_user(
            str(self.bin / "psql"),
            "-h",
            str(self.data),
            "-p",
            str(self.port),
            "-U",
            self.ADMIN,
            "-d",
            database,
            "-v",
            "ON_ERROR_STOP=1",
            "-At",
            "-c",
            statement,
        )
        return done.stdout.strip()

    @property
    def url(self) -> str:
        """Where watcher connects: no password in it (that comes from password_file)."""
        return f"postgresql://{self.role}@127.0.0.1:{self.port}/{self.database}"

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGINT)  # fast shutdown: clients cut, data flushed
            self.proc.wait(30)
        shutil.rmtree(self.root, ignore_errors=True)
