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


def test_modules_stay_small_and_say_what_they_are_for():
    """No module of watcher is over 500 lines, and each opens with a docstring saying its
    purpose (the contributor guide's style rule, checked instead of hoped for)."""
    import ast

    long, bare = [], []
    for path in sorted(ROOT.rglob("*.py")):
        text = path.read_text()
        name = str(path.relative_to(ROOT.parent))
        if len(text.splitlines()) > 500:
            long.append(f"{name}: {len(text.splitlines())} lines")
        if path.name not in ("__init__.py", "__main__.py") and not ast.get_docstring(ast.parse(text)):
            bare.append(name)
    assert long == [] and bare == []


def test_no_import_cycles():
    """The package's import graph has no cycle between modules (import-linter checks the
    layers; this checks that no two modules need each other at all)."""
    import grimp

    graph = grimp.build_graph("watcher")
    cycles = []
    for module in sorted(graph.modules):
        for imported in graph.find_modules_directly_imported_by(module):
            if imported != module and graph.chain_exists(imported, module):
                cycles.append(f"{module} <-> {imported}")
    assert cycles == []
