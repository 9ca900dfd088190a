"""The base of every repository: one kind of record's SQL, on the store's connection.

A repository never opens, commits or rolls back: `Store.atomic` owns the transaction, so any
mix of repository calls inside it commits together or not at all."""

from __future__ import annotations

import sqlite3


class Repo:
    def __init__(self, conn: sqlite3.Connection):
        self.conn = conn


def text(s: str) -> str:
    """Text SQLite can store as UTF-8: lone surrogates become backslash escapes."""
    return s.encode("utf-8", "backslashreplace").decode("utf-8")


def marks(n: int) -> str:
    """n comma-separated placeholders."""
    return ", ".join("?" * n)
