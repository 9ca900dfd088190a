"""Settings declared once, beside the type that holds them.

A configurable dataclass field is made with `setting(...)`: its default (in the field's own
unit), what it means, its allowed range or choices, the key it has in the configuration file
and the scale from that key's unit to the field's (`repeat_min` -> `repeat_s`: 60). The
configuration reader (watcher.config) reads every declared field from its table, with the same
refusals for every key; the configuration reference (docs/configuration.md) is generated from
the same declarations. Standard library only: the MQTT process imports its broker settings.
"""

from __future__ import annotations

from dataclasses import MISSING, Field, dataclass, field, fields


@dataclass(frozen=True)
class Declared:
    name: str  # the field
    key: str  # in the configuration file
    kind: str  # float, int, bool or str
    default: object  # in the file's unit; MISSING when the key is required
    doc: str
    lo: float | None = None
    hi: float | None = None
    scale: float = 1.0  # field value = file value * scale
    choices: tuple[str, ...] | None = None
    ident: bool = False  # letters, digits, '-' and '_' only


def setting(
    default=MISSING,
    doc: str = "",
    *,
    lo: float | None = None,
    hi: float | None = None,
    key: str | None = None,
    scale: float = 1.0,
    choices: tuple[str, ...] | None = None,
    ident: bool = False,
    factory=None,
    repr: bool = True,
) -> Field:
    """A dataclass field that the configuration reader fills from the file (see module doc)."""
    meta = {"doc": doc, "lo": lo, "hi": hi, "key": key, "scale": scale, "choices": choices, "ident": ident}
    if factory is not None:
        return field(default_factory=factory, metadata=meta, repr=repr)
    return field(default=default, metadata=meta, repr=repr)


def declared(cls) -> list[Declared]:
    """The declared settings of a dataclass, in field order, defaults in the file's units."""
    out = []
    for f in fields(cls):
        m = f.metadata
        if "doc" not in m:
            continue
        kind = str(f.type).split("|")[0].strip()
        default = f.default_factory() if f.default_factory is not MISSING else f.default
        if kind in ("float", "int") and default not in (MISSING, None) and m["scale"] != 1.0:
            default = default / m["scale"]
        out.append(
            Declared(
                f.name,
                m["key"] or f.name,
                kind,
                default,
                m["doc"],
                m["lo"],
                m["hi"],
                m["scale"],
                m["choices"],
                m["ident"],
            )
        )
    return out
