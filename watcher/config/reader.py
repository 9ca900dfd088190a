"""Typed reading of one TOML table: every refusal names the file, the key path, the value and
what was expected (ConfigError, exit code 2). Declared settings (watcher.declare) are read in
one loop; secrets come from a file or systemd's credentials directory, never the main file.
"""

from __future__ import annotations

import logging
import math
import os
import re
from dataclasses import MISSING
from pathlib import Path

from watcher.declare import declared
from watcher.errors import ConfigError

log = logging.getLogger("watcher.config")

REQUIRED = MISSING  # a key without a default
RECORDER: list | None = None  # set by watcher.config_doc: every key asked for, to make the reference
_SECRET_WORD = re.compile(
    r"(^|_)(pass|passwd|password|passphrase|secret|token|api_?key|key|auth|bearer|cred|credentials?)($|_)"
)


def secret_shaped(key: str) -> bool:
    """A key whose value may be a secret (a stray `password`, a `url` beside `url_file`): a
    refusal never echoes it. Keys naming a file or a credential hold paths and names."""
    if key.endswith(("_file", "_credential", "_path")):
        return False
    return key in ("url", "uri", "dsn") or bool(_SECRET_WORD.search(key))


def choice_text(choices: tuple[str, ...]) -> str:
    return " or ".join([", ".join(choices[:-1]), choices[-1]]) if len(choices) <= 3 else "one of " + ", ".join(choices)


class Reader:
    """Typed access to one TOML table with the key path in every message."""

    def __init__(self, file: str, table: dict, where: str):
        self.file, self.table, self.where = file, table, where
        self.used: set[str] = set()

    def fail(self, key: str, value, expected: str):
        path = f"{self.where}.{key}" if self.where else key
        if secret_shaped(key):
            value = "(not shown: the key may hold a secret)"
        raise ConfigError(f"{self.file}: {path}", value, expected)

    def get(self, key, kinds, default, expected, doc: str = ""):
        self.used.add(key)
        if RECORDER is not None:
            RECORDER.append((self.where, key, default, expected, doc))
        if key not in self.table:
            if default is REQUIRED:
                self.fail(key, None, expected + " (required)")
            return default
        value = self.table[key]
        if isinstance(value, bool) and bool not in kinds or not isinstance(value, kinds):
            self.fail(key, value, expected)
        return value

    def text(self, key, default=None, doc: str = ""):
        return self.get(key, (str,), default, "a string", doc)

    def flag(self, key, default, doc: str = ""):
        return self.get(key, (bool,), default, "true or false", doc)

    def number(self, key, default=None, lo=-math.inf, hi=math.inf, doc: str = ""):
        v = self.get(key, (int, float), default, f"a number in [{lo}, {hi}]", doc)
        if v is not None and (not math.isfinite(float(v)) or not lo <= v <= hi):
            self.fail(key, v, f"a number in [{lo}, {hi}]")
        return None if v is None else float(v)

    def integer(self, key, default=None, lo=-(2**62), hi=2**62, doc: str = ""):
        v = self.get(key, (int,), default, f"a whole number in [{lo}, {hi}]", doc)
        if v is not None and not lo <= v <= hi:
            self.fail(key, v, f"a whole number in [{lo}, {hi}]")
        return v

    def ident(self, key: str, doc: str = "") -> str:
        value = self.text(key, REQUIRED, doc)
        if not value or not all(c.isalnum() or c in "-_" for c in value):
            self.fail(key, value, "an id of letters, digits, '-' and '_'")
        return value

    def sub(self, key) -> Reader:
        value = self.get(key, (dict,), {}, "a table")
        return Reader(self.file, value, f"{self.where}.{key}" if self.where else key)

    def items(self, key, default, expected: str) -> list[Reader]:
        """A reader for each table of an array of tables ([[zones]], [[alerts.rules]])."""
        raw = self.get(key, (list,), default, expected)
        base = f"{self.where}.{key}" if self.where else key
        return [Reader(self.file, x if isinstance(x, dict) else {}, f"{base}[{k}]") for k, x in enumerate(raw or [])]

    def declared(self, cls) -> dict:
        """Every setting cls declares, read, checked and scaled to the field's unit."""
        out = {}
        for d in declared(cls):
            lo = -math.inf if d.lo is None else d.lo
            hi = math.inf if d.hi is None else d.hi
            if d.ident:
                value = self.ident(d.key, d.doc)
            elif d.kind == "float":
                value = self.number(d.key, d.default, lo, hi, d.doc)
            elif d.kind == "int":
                value = self.integer(
                    d.key, d.default, -(2**62) if d.lo is None else d.lo, 2**62 if d.hi is None else d.hi, d.doc
                )
            elif d.kind == "bool":
                value = self.flag(d.key, d.default, d.doc)
            else:
                value = self.text(d.key, d.default, d.doc)
                if d.choices and value not in d.choices:
                    self.fail(d.key, value, choice_text(d.choices))
            if value is not None and d.scale != 1.0:
                value = value * d.scale
            out[d.name] = value
        return out

    def done(self):
        for key in self.table:
            if key not in self.used:
                self.fail(key, self.table[key], "no such key (see config.example.toml)")


# The unit loads every file of /etc/watcher/credentials/notify/ (LoadCredential=notify:DIR),
# which systemd names notify_<file>: so channel names are free and an upgrade keeps them.
CREDENTIAL_DIRS = ("notify",)


def credential_path(folder: Path, name: str) -> Path:
    """Where systemd put the credential called name: under that name, or (not found so) as a
    file of a directory the unit loads, `notify_<name>`."""
    direct = folder / name
    if direct.exists():
        return direct
    for prefix in CREDENTIAL_DIRS:
        loaded = folder / f"{prefix}_{name}"
        if loaded.exists():
            return loaded
    return direct


def read_secret(r: Reader, file_key: str, cred_key: str, doc: str) -> str | None:
    """A secret from a file (file_key) or a systemd credential (cred_key), one of them at most."""
    path = r.text(file_key, doc=f"{doc}: a file holding it (mode 0600), when run by hand")
    cred = r.text(cred_key, doc=f"{doc}: a credential name under $CREDENTIALS_DIRECTORY (systemd LoadCredential=)")
    if path and cred:
        r.fail(cred_key, cred, f"only one of {file_key} and {cred_key}")
    if cred:
        folder = os.environ.get("CREDENTIALS_DIRECTORY")
        if not folder:
            r.fail(cred_key, cred, "a credential name with $CREDENTIALS_DIRECTORY set (systemd LoadCredential=)")
        path = str(credential_path(Path(folder), cred))
    if not path:
        return None
    try:
        if Path(path).stat().st_mode & 0o004:
            log.warning("%s: %s is readable by every user; make it 0600 (it holds a secret)", r.file, path)
        return Path(path).read_text(encoding="utf-8").strip()
    except OSError as exc:
        r.fail(file_key if not cred else cred_key, path, f"a readable file ({exc.strerror})")
    return None
