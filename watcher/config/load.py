"""Service configuration: TOML in, frozen settings out, validated once.

Plain settings are read from their declarations (watcher.declare, config/settings.py); what
needs more than a type and a range (TLS, topics, zones, sources, rules, channels, the report
schedule) is read here and in config/sections.py, with the checks between keys in code.
"""

from __future__ import annotations

import tomllib
from pathlib import Path
from urllib.parse import urlsplit
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from watcher.config.reader import REQUIRED, Reader, read_secret
from watcher.config.sections import alerting, channels, events, positions, reports, source
from watcher.config.settings import Config, Health, Ingest, Site, Storage, Zone
from watcher.errors import ConfigError, ProfileError
from watcher.files.profiles import load_profile
from watcher.ingest.payload import Limits
from watcher.ingest.settings import Broker, Tls
from watcher.ingest.topics import topic_is_clean

FREEZER_MAX_SETPOINT_C = -10.0  # warmer than this is no frozen store: refused unless marked deliberate


def load_config(path: str) -> Config:
    """Read and validate a configuration file."""
    try:
        data = tomllib.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ConfigError(path, "missing file", "a readable TOML configuration file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(path, type(exc).__name__, f"a readable UTF-8 TOML file ({exc})") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(path, "invalid TOML", f"valid TOML ({exc})") from None
    return config_from_dict(data, path)


def config_from_dict(data: dict, path: str = "config") -> Config:
    root = Reader(path, data, "")
    broker_ = broker(root.sub("broker"))
    storage = _storage(root.sub("storage"))
    ingest = _ingest(root.sub("ingest"))
    if ingest.limits.past_limit_s > storage.raw_retention_days * 86400.0:
        root.fail(
            "ingest.past_limit_days",
            ingest.limits.past_limit_s / 86400.0,
            f"at most storage.raw_retention_days ({storage.raw_retention_days}): older readings could no longer be merged in order",
        )
    h = root.sub("health")
    health = Health(**h.declared(Health))
    h.done()
    sites = _sites(root)
    zones = _zones(root, sites)
    zone_ids = {z.id for z in zones}
    sources = []
    for r in root.items("sources", REQUIRED, "a list of [[sources]] tables"):
        sources.append(source(r, zone_ids))
        r.done()
    if not sources:
        root.fail("sources", [], "at least one [[sources]] table")
    config = Config(
        path,
        broker_,
        storage,
        ingest,
        health,
        tuple(sites),
        tuple(zones),
        tuple(sources),
        alerting(root.sub("alerts"), zone_ids),
        events(root.sub("events")),
        channels(root),
        reports(root.sub("reports")),
    )
    root.done()
    return config


def broker(b: Reader) -> Broker:
    tls = None
    if "tls" in b.table:  # present, even empty: TLS is wanted and must never fall back to plain text
        t = b.sub("tls")
        tls = Tls(**t.declared(Tls))
        if bool(tls.cert_file) != bool(tls.key_file):
            t.fail("key_file", tls.key_file, "cert_file and key_file together")
        for key in ("ca_file", "cert_file", "key_file"):
            value = getattr(tls, key)
            if value is not None and not (value.strip() and Path(value).is_file()):
                hint = " (the CA that signed the broker's certificate)" if key == "ca_file" else ""
                t.fail(key, value, "an existing file" + hint)
        t.done()
    given = b.declared(Broker)
    for key in ("status_topic", "ack_topic", "lot_topic"):
        if not topic_is_clean(given[key]):
            b.fail(key, given[key], "a topic without wildcards, control characters or empty levels")
    if not given["client_id"].strip():
        b.fail("client_id", given["client_id"], "a stable, unique, non-empty client id")
    password = read_secret(b, "password_file", "password_credential", "the broker password")
    b.done()
    return Broker(**given, password=password, tls=tls)


def _storage(s: Reader) -> Storage:
    given = s.declared(Storage)
    for key in ("url", "reader_url"):
        url = given[key]
        if url is None:
            continue
        parts = urlsplit(url)
        if parts.scheme not in ("postgresql", "postgres") or not parts.hostname or not parts.path.strip("/"):
            s.fail(key, url, "postgresql://user@host:port/database")
        if parts.password is not None or "password=" in parts.query:
            s.fail(
                key, "postgresql://…(a password)…", "a URL without a password: its password_file or password_credential"
            )
    if given["reader_url"] is not None and given["url"] is None:
        s.fail("reader_url", given["reader_url"], "a reader's URL only beside url (a PostgreSQL record)")
    password = read_secret(s, "password_file", "password_credential", "the PostgreSQL password")
    reader = read_secret(s, "reader_password_file", "reader_password_credential", "the read-only role's password")
    s.done()
    return Storage(**given, password=password, reader_password=reader)


def _ingest(i: Reader) -> Ingest:
    lo_hi = i.get(
        "temperature_range_c",
        (list,),
        [-60.0, 40.0],
        "a list [low, high] in C",
        "readings outside are sensor faults, rejected with the reason",
    )
    if (
        len(lo_hi) != 2
        or not all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in lo_hi)
        or lo_hi[0] >= lo_hi[1]
    ):
        i.fail("temperature_range_c", lo_hi, "a list [low, high] of numbers with low < high")
    limits = Limits(**i.declared(Limits), temp_range_c=(float(lo_hi[0]), float(lo_hi[1])))
    ingest = Ingest(**i.declared(Ingest), limits=limits)
    i.done()
    return ingest


def _sites(root: Reader) -> list[Site]:
    sites = []
    for r in root.items("sites", [], "a list of [[sites]] tables"):
        site = Site(**r.declared(Site))
        try:
            ZoneInfo(site.timezone)
        except (ZoneInfoNotFoundError, ValueError):
            r.fail("timezone", site.timezone, "an IANA time zone such as Europe/London")
        sites.append(site)
        r.done()
    if len({x.id for x in sites}) != len(sites):
        root.fail("sites", [x.id for x in sites], "unique site ids")
    return sites


def _zones(root: Reader, sites: list[Site]) -> list[Zone]:

    site_ids = {x.id for x in sites}
    zones = []
    for r in root.items("zones", REQUIRED, "a list of [[zones]] tables"):
        zid = r.ident("id", "a short id of letters, digits, '-' and '_' (used in topics and commands)")
        site = r.text(
            "site", sites[0].id if len(sites) == 1 else None, "the zone's [[sites]] id; may be left out with one site"
        )
        if site not in site_ids:
            r.fail("site", site, "one of the [[sites]] ids: " + ", ".join(sorted(site_ids)))
        prof_name = r.text("profile", "dairy-ice-cream", "a shipped profile name or a profile TOML file")
        try:
            profile = load_profile(prof_name)
        except ProfileError as exc:
            r.fail("profile", prof_name, f"a usable profile ({exc})")
        name = r.text("name", zid, "the zone's name in messages and summaries")
        setpoint_c = r.number("setpoint_c", REQUIRED, -60.0, 0.0, "the air setpoint")
        deliberate = r.flag(
            "setpoint_deliberate",
            False,
            "true to accept a setpoint above -10 C (not a freezer's: a typo or Fahrenheit?)",
        )
        if setpoint_c > FREEZER_MAX_SETPOINT_C and not deliberate:
            r.fail(
                "setpoint_c",
                setpoint_c,
                f"a frozen-store setpoint at or below {FREEZER_MAX_SETPOINT_C:g} C (in Celsius; -4 F is -20 C), "
                "or setpoint_deliberate = true",
            )
        zones.append(Zone(zid, site, name, setpoint_c, profile, positions(r)))
        r.done()
    if not zones:
        root.fail("zones", [], "at least one [[zones]] table")
    zone_ids = [z.id for z in zones]
    if len(set(zone_ids)) != len(zone_ids):
        root.fail("zones", zone_ids, "unique zone ids")
    return zones
