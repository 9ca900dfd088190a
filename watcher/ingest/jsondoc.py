"""One strict reader of JSON payloads for every MQTT message kind. Pure.

Readings, acknowledgements and lot events all come through here, so all three refuse the same
things: text that is not UTF-8, NaN/Infinity, integers longer than any id or timestamp needs,
and strings holding lone UTF-16 surrogates (``"\\ud800"`` is valid JSON but cannot be stored as
UTF-8, and it stopped the writer once).
"""

from __future__ import annotations

import json

MAX_INT_DIGITS = 20  # epoch milliseconds need 13; a 64-bit id needs 19


class BadJson(ValueError):
    """The payload is not JSON watcher can take; the message is the reason."""


def _int(text: str) -> int:
    if len(text.lstrip("-")) > MAX_INT_DIGITS:
        raise BadJson(f"an integer of {len(text.lstrip('-'))} digits (at most {MAX_INT_DIGITS})")
    return int(text)


def _constant(name: str):
    raise ValueError(f"{name} is not valid JSON")


def storable(text: str) -> bool:
    """True when the text can be stored as UTF-8 (no lone surrogates, e.g. from argv)."""
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        return False
    return True


def load_json(payload: bytes):
    """The decoded document, or BadJson naming what is wrong."""
    try:
        text = payload.decode("utf-8")
    except UnicodeDecodeError:
        raise BadJson("payload is not UTF-8") from None
    try:
        doc = json.loads(text, parse_int=_int, parse_constant=_constant)
    except BadJson:
        raise
    except RecursionError:
        raise BadJson("JSON nested too deeply") from None
    except ValueError as exc:
        raise BadJson(f"invalid JSON ({str(exc)[:60]})") from None
    if "\\u" not in text:  # a lone surrogate can only come from a \u escape (the text was valid UTF-8)
        return doc
    try:
        json.dumps(doc, ensure_ascii=False).encode("utf-8")
    except UnicodeEncodeError:
        raise BadJson("a string holds a lone UTF-16 surrogate (not storable as UTF-8)") from None
    except RecursionError:
        raise BadJson("JSON nested too deeply") from None
    return doc
