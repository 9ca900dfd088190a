"""Sparkplug B aliases as the last birth of each edge node and device named them, so data that
carry only aliases are read after a restart without waiting for the next birth."""

from __future__ import annotations

from watcher.store.repo import Repo


class Aliases(Repo):
    def replace(self, key: str, names: dict[int, str]) -> None:
        """What one birth said for `key` ("group/edge[/device]"), replacing the last one's."""
        self.conn.execute("DELETE FROM sparkplug_aliases WHERE source = ?", (key,))
        self.conn.executemany(
            "INSERT INTO sparkplug_aliases (source, alias, name) VALUES (?,?,?)",
            [(key, alias, name) for alias, name in names.items()],
        )

    def all(self) -> dict[str, dict[int, str]]:
        out: dict[str, dict[int, str]] = {}
        for key, alias, name in self.conn.execute("SELECT source, alias, name FROM sparkplug_aliases"):
            out.setdefault(key, {})[alias] = name
        return out
