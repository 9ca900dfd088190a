"""Product profiles on disk: the shipped ones under watcher/data/profiles and TOML files."""

from __future__ import annotations

import json
import tomllib
from importlib import resources
from pathlib import Path

from watcher.errors import ProfileError
from watcher.model.profiles import Profile, profile_from_dict

DEFAULT_PROFILE = "dairy-ice-cream"


def builtin_names() -> list[str]:
    folder = resources.files("watcher.data") / "profiles"
    return sorted(p.name[:-5] for p in folder.iterdir() if p.name.endswith(".toml"))


def load_profile(name_or_path: str | None) -> Profile:
    """A shipped profile by name, or a TOML file by path."""
    name_or_path = name_or_path or DEFAULT_PROFILE
    if name_or_path in builtin_names():
        text = (resources.files("watcher.data") / "profiles" / f"{name_or_path}.toml").read_text(encoding="utf-8")
        return _parse(text, f"profile {name_or_path}")
    path = Path(name_or_path)
    if not path.is_file():
        raise ProfileError(
            "--profile", name_or_path, "a shipped profile name (" + ", ".join(builtin_names()) + ") or a TOML file"
        )
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ProfileError(str(path), type(exc).__name__, f"a readable UTF-8 TOML file ({exc})") from exc
    return _parse(text, str(path))


def _parse(text: str, where: str) -> Profile:
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ProfileError(where, "invalid TOML", f"valid TOML ({exc})") from exc
    return profile_from_dict(data, where)


def _toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        return repr(float(value)) if isinstance(value, float) else str(value)
    return json.dumps(str(value), ensure_ascii=False)


def profile_to_toml(profile: Profile, header: list[str] | None = None) -> str:
    """TOML text that load_profile reads back to an equal Profile."""
    data = profile.as_dict()
    lines = [f"# {h}" if h else "#" for h in (header or [])]
    if lines:
        lines.append("")
    for key in ("name", "description", "source"):
        lines.append(f"{key} = {_toml_value(data[key])}")
    for section in ("initial", "texture", "life", "kinetics", "ice"):
        if section not in data:
            continue
        lines.append("")
        lines.append(f"[{section}]")
        for key, value in data[section].items():
            lines.append(f"{key} = {_toml_value(value)}")
    return "\n".join(lines) + "\n"
