"""The one place that decides what of a notification URL may be shown. Pure (stdlib only).

Apprise URLs carry credentials in many places: user info (`user:password@`), path segments
(webhook tokens: `json://host/hook/<token>`, `slack://<a>/<b>/<c>`), query values (`token=`,
`key=`) and headers (`+Authorization=Bearer ...`, `-X-Api-Key=...`). Everything that can hold a
secret is masked before anything is printed, logged or stored: the scheme, host and port stay
(they tell which channel it is), each path segment keeps its first character, user info becomes
`****`, and the value of every header and of every secret-shaped query key becomes `****`.
Apprise's own privacy form was used before and left path tokens and headers in clear.

`scrub` removes the same secret parts from free text (apprise's log lines, error messages).
"""

from __future__ import annotations

import re
from urllib.parse import parse_qsl, quote, unquote, urlsplit

SECRET_KEY = re.compile(r"(pass|secret|token|key|auth|sig|cred|bearer|session|access|code|apikey|webhook)", re.I)
INSECURE_OPTIONS = {"verify": ("no", "false", "0", "off", "n")}
TOKEN_MIN = 6  # a path segment this long or longer may be a token and is masked
HOSTLIKE = re.compile(r"^(localhost|[0-9.]+|\[[0-9a-f:]+\]|[a-z0-9-]+(\.[a-z0-9-]+)+)$", re.I)


def _query(p) -> list[tuple[str, str]]:
    # '+' starts a header name in apprise URLs; keep it rather than read it as a space
    return parse_qsl(p.query.replace("+", "%2B"), keep_blank_values=True)


def _masked_segment(s: str) -> str:
    s = unquote(s)
    return s[:1] + "****" if len(s) >= TOKEN_MIN else s


def _parts(url: str):
    try:
        return urlsplit(url.strip())
    except ValueError:
        return None


def mask_url(url: str) -> str:
    """The URL with every part that may hold a credential masked (safe to log and print)."""
    p = _parts(url)
    if p is None or not p.scheme:
        return "(an unreadable URL)"
    try:
        host = p.hostname or ""
        port = f":{p.port}" if p.port else ""
    except ValueError:
        host, port = "", ""
    if not HOSTLIKE.match(host):  # in many apprise schemes the "host" is a bot or webhook token
        host = _masked_segment(p.netloc.rsplit("@", 1)[-1]) if p.netloc else ""
        port = ""
    userinfo = "****@" if (p.username or p.password) else ""
    segments = [s for s in p.path.split("/") if s]
    path = "".join("/" + _masked_segment(s) for s in segments)
    query = []
    for k, v in _query(p):
        hidden = k[:1] in "+-:" or SECRET_KEY.search(k)
        query.append(f"{quote(k, safe='+-:_.')}={'****' if hidden else quote(v, safe='@.,_-')}")
    netloc = f"{userinfo}{host}{port}"
    return f"{p.scheme}://{netloc}{path}" + (f"?{'&'.join(query)}" if query else "")


def secret_parts(url: str) -> list[str]:
    """The substrings of the URL that must never appear in clear (longest first)."""
    p = _parts(url)
    if p is None:
        return [url] if url else []
    out = []
    if p.password:
        out.append(p.password)
    if p.username:
        out.append(p.username)
    host = p.netloc.rsplit("@", 1)[-1]
    if host and not HOSTLIKE.match(p.hostname or ""):
        out.append(host)
    out += [s for s in p.path.split("/") if len(s) >= TOKEN_MIN]
    for k, v in _query(p):
        if v and (k[:1] in "+-:" or SECRET_KEY.search(k)):
            out.append(v)
    out += [unquote(s) for s in list(out)]
    return sorted({s for s in out if len(s) >= 3}, key=len, reverse=True)


def scrub(text: str, urls) -> str:
    """Free text with every secret part of the given URLs replaced by ****."""
    for url in urls:
        for part in secret_parts(url):
            text = text.replace(part, "****")
    return text


def insecure_options(url: str) -> list[str]:
    """Options on the URL that switch TLS certificate checks off (e.g. verify=no)."""
    p = _parts(url)
    if p is None:
        return []
    return [f"{k}={v}" for k, v in _query(p) if v.lower() in INSECURE_OPTIONS.get(k.lower(), ())]
