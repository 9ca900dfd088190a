"""Write docs/configuration.md from the configuration reader itself.

Every key the reader asks for, with its type, range, default and meaning, is recorded while
config.example.toml is read: plain settings come from their declarations (watcher.declare),
the rest from the reader's own calls. A test regenerates the page and compares, so the
reference cannot drift from the code.
Usage: python -m watcher.config_doc > docs/configuration.md
"""

from __future__ import annotations

import os
import re
import sys
import tempfile
import tomllib
from pathlib import Path

from watcher.config import config_from_dict
from watcher.config import reader as config_reader

ROOT = Path(__file__).resolve().parent.parent
EXAMPLE = ROOT / "config.example.toml"


def _shown(default) -> str:
    if default is config_reader.REQUIRED:
        return "required"
    if default is None:
        return "unset"
    if isinstance(default, bool):
        return "true" if default else "false"
    if isinstance(default, str):
        return f'"{default}"'
    return str(default)


def render() -> str:
    text = EXAMPLE.read_text()
    data = tomllib.loads(text)
    with tempfile.TemporaryDirectory() as tmp:
        creds = Path(tmp)
        for name in ("broker-password", "notify_qa-mail", "notify_night-chat"):  # as the unit names them
            (creds / name).write_text("mailto://user:pw@smtp.example/?to=qa@example\n")
            (creds / name).chmod(0o600)
        (creds / "ca.pem").write_text("")
        data["broker"]["tls"]["ca_file"] = str(creds / "ca.pem")
        saved = {k: os.environ.get(k) for k in ("CREDENTIALS_DIRECTORY", "STATE_DIRECTORY")}
        os.environ["CREDENTIALS_DIRECTORY"] = str(creds)
        os.environ.pop("STATE_DIRECTORY", None)
        config_reader.RECORDER = []
        try:
            config_from_dict(data, "config.example.toml")
            recorded = config_reader.RECORDER
        finally:
            config_reader.RECORDER = None
            for k, v in saved.items():
                if v is None:
                    os.environ.pop(k, None)
                else:
                    os.environ[k] = v
    tables: dict[str, dict[str, tuple]] = {}
    for where, key, default, expected, doc in recorded:
        table = re.sub(r"\[\d+\]", "", where)
        if expected == "a table" or expected.startswith("a list of [[") or expected.startswith("a list of {"):
            if key != "positions":
                continue
        entry = tables.setdefault(table, {}).get(key)
        shown = _shown(default)
        if entry is not None and entry[1] != shown:
            shown = "depends on the rule" if table == "alerts.rules" else "varies"
        tables[table][key] = (expected, shown, doc)
    lines = [
        "# Configuration reference",
        "",
        "Generated from the settings' declarations and the configuration reader by",
        "`python -m watcher.config_doc` (a test checks that it is current). Every key, its type and",
        "range, its default and what it means. Unknown keys, wrong types and values out of range stop",
        "start-up with exit code 2 and a message naming the file, the key path, the value and what was expected.",
        "",
    ]
    for table in sorted(tables, key=lambda t: (t != "", t)):
        title = table or "top level"
        array = table in ("sites", "zones", "sources", "notify", "alerts.rules", "zones.positions")
        lines += [
            f"## `[{'[' if array else ''}{title}{']' if array else ''}]`",
            "",
            "| key | expected | default | note |",
            "|---|---|---|---|",
        ]
        for key, (expected, shown, note) in tables[table].items():
            lines.append(f"| `{key}` | {expected} | {shown} | {note.replace('|', '/')} |")
        lines.append("")
    return "\n".join(lines)


if __name__ == "__main__":
    sys.stdout.write(render())
