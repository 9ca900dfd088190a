"""Topic patterns with named placeholders, e.g. ``kestrel/{zone}/{sensor}/air``.

A placeholder fills one whole topic level. The subscription filter replaces each placeholder
with ``+``. Matching a concrete topic yields the placeholder values. Pure: no I/O.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

_PLACEHOLDER = re.compile(r"^\{([a-z_][a-z0-9_]*)\}$")
_BAD_LEVEL_CHARS = re.compile(r"[+#\x00-\x1f\x7f]")
ZONE_TEMPLATE = re.compile(r"\{([a-z_][a-z0-9_]*)\}")  # a source's zone made of placeholders: "{site}-{zone}"


@dataclass(frozen=True)
class TopicPattern:
    text: str
    levels: tuple[str, ...]
    names: tuple[str | None, ...]

    @property
    def filter(self) -> str:
        """The MQTT subscription filter for this pattern."""
        return "/".join("+" if n else lvl for lvl, n in zip(self.levels, self.names))

    @property
    def placeholders(self) -> set[str]:
        return {n for n in self.names if n}

    def match(self, topic: str) -> dict[str, str] | None:
        """Placeholder values if the topic matches, else None."""
        parts = topic.split("/")
        if len(parts) != len(self.levels):
            return None
        values: dict[str, str] = {}
        for part, lvl, name in zip(parts, self.levels, self.names):
            if name:
                if not part or _BAD_LEVEL_CHARS.search(part):
                    return None
                values[name] = part
            elif part != lvl:
                return None
        return values


def parse_pattern(text: str) -> TopicPattern:
    """Parse a pattern; raise ValueError with the reason when it cannot be used."""
    if not text or text.startswith("/") or text.endswith("/"):
        raise ValueError("a topic pattern with no empty first or last level")
    levels = tuple(text.split("/"))
    names: list[str | None] = []
    for lvl in levels:
        m = _PLACEHOLDER.match(lvl)
        if m:
            names.append(m.group(1))
        elif "{" in lvl or "}" in lvl:
            raise ValueError(f"placeholders that fill a whole level, like {{zone}} (level {lvl!r})")
        elif not lvl or _BAD_LEVEL_CHARS.search(lvl):
            raise ValueError(f"levels without wildcards or control characters (level {lvl!r})")
        else:
            names.append(None)
    found = [n for n in names if n]
    if len(found) != len(set(found)):
        raise ValueError("each placeholder at most once")
    return TopicPattern(text, levels, tuple(names))


def topic_is_clean(topic: str) -> bool:
    """A concrete topic: no wildcard, no control character, no empty level."""
    return bool(topic) and not _BAD_LEVEL_CHARS.search(topic) and "" not in topic.split("/")


def fill_template(text: str, names: dict[str, str]) -> str:
    """A zone template ("{site}-{zone}") with the placeholder values of a matched topic."""
    return ZONE_TEMPLATE.sub(lambda m: names[m.group(1)], text)
