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
        self._launch()
        self.sql(f"CREATE ROLE {self.role} LOGIN PASSWORD '{self.password}'")
        self.sql(f"CREATE DATABASE {self.database} OWNER {self.role}")

    def _launch(self) -> None:
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
        return self.url_of(self.database)

    def url_of(self, database: str, role: str | None = None) -> str:
        return f"postgresql://{role or self.role}@127.0.0.1:{self.port}/{database}"

    def new_database(self, name: str) -> str:
        """An empty database owned by watcher's role; its URL."""
        self.sql(f"CREATE DATABASE {name} OWNER {self.role}")
        return self.url_of(name)

    def add_reader(self, database: str, role: str = "watcher_reader") -> tuple[str, Path]:
        """A role that may only read the record's tables, those there now and those watcher
        makes later (as docs/fleet.md says); its URL and password file."""
        password = "rd-" + os.urandom(8).hex()
        if not self.sql(f"SELECT 1 FROM pg_roles WHERE rolname = '{role}'"):
            self.sql(f"CREATE ROLE {role} LOGIN PASSWORD '{password}'")
        else:
            self.sql(f"ALTER ROLE {role} PASSWORD '{password}'")
        self.sql(f"GRANT CONNECT ON DATABASE {database} TO {role}")
        self.sql(f"GRANT SELECT ON ALL TABLES IN SCHEMA public TO {role}", database)
        # and every table watcher makes later (the record may not exist yet)
        self.sql(
            f"ALTER DEFAULT PRIVILEGES FOR ROLE {self.role} IN SCHEMA public GRANT SELECT ON TABLES TO {role}", database
        )
        file = self.root / f"{role}-{database}-password"
        file.write_text(password + "\n")
        file.chmod(0o600)
        return self.url_of(database, role), file

    def pgpass(self) -> Path:
        """A libpq password file for watcher's role (what `--db postgresql://...` reads through
        PGPASSFILE)."""
        file = self.root / "pgpass"
        file.write_text(f"127.0.0.1:{self.port}:*:{self.role}:{self.password}\n")
        file.chmod(0o600)
        return file

    def restart(self) -> None:
        """Stop the server (fast: clients cut) and start it again on the same port and data."""
        self.proc.send_signal(signal.SIGINT)
        self.proc.wait(30)
        self._launch()

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGINT)  # fast shutdown: clients cut, data flushed
            self.proc.wait(30)
        shutil.rmtree(self.root, ignore_errors=True)
