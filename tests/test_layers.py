"""Layering that holds by construction: checked on the source, so a shortcut fails the build."""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent / "watcher"
SQL = re.compile(r"""["'](SELECT|INSERT|UPDATE|DELETE|CREATE|ALTER)\s""")


def test_no_sql_outside_the_store():
    """Every SQL statement lives in watcher/store/ (a second storage backend then has one place
    to implement); other layers call the store's methods."""
    offenders = []
    for path in ROOT.rglob("*.py"):
        if path.relative_to(ROOT).parts[0] == "store":
            continue
        text = path.read_text()
        for n, line in enumerate(text.splitlines(), 1):
            if ".execute(" in line or SQL.search(line):
                offenders.append(f"{path.relative_to(ROOT.parent)}:{n}: {line.strip()[:80]}")
    assert offenders == []


def test_every_test_says_what_it_checks():
    """Each test has a docstring saying the behaviour it checks (the contributor guide asks for it)."""
    import ast

    bare = []
    for path in sorted((ROOT.parent / "tests").glob("test_*.py")):
        for node in ast.parse(path.read_text()).body:
            if isinstance(node, ast.FunctionDef) and node.name.startswith("test_") and not ast.get_docstring(node):
                bare.append(f"{path.name}::{node.name}")
    assert bare == []
