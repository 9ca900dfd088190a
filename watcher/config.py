"""Service configuration: TOML in, frozen settings out, validated once.

Every refusal raises ConfigError naming the file, the key path, the value and what was
expected; the CLI turns it into exit code 2. Secrets never sit in the main file: the broker
password comes from a file or from systemd's credentials directory.
"""

from __future__ import annotations

import logging
import math
import os
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from watcher.alerts.channels import Channel
from watcher.alerts.messages import auto_label
from watcher.alerts.metrics import metric as metric_named
from watcher.alerts.policy import METRICS, SEVERITIES, Rule, default_rules
from watcher.errors import ConfigError, ProfileError
from watcher.events.detect import DefrostShape
from watcher.ingest.payload import SIGNALS, Limits, Source
from watcher.ingest.settings import Broker, Tls
from watcher.ingest.topics import parse_pattern, topic_is_clean
from watcher.model.integrator import DEFAULT_POSITIONS, Position
from watcher.model.profiles import Profile

log = logging.getLogger("watcher.config")


@dataclass(frozen=True)
class Storage:
    path: str
    raw_retention_days: int = 400


@dataclass(frozen=True)
class Ingest:
    reorder_window_s: float = 120.0
    max_gap_s: float = 900.0
    batch_max: int = 1000
    batch_wait_s: float = 0.02
    stall_limit_s: float = 600.0
    hold_days: float = 7.0
    hold_max: int = 100_000
    max_sensors_per_zone: int = 64
    rejections_per_topic_per_min: int = 60
    limits: Limits = Limits()


@dataclass(frozen=True)
class Health:
    host: str = "127.0.0.1"
    port: int = 9108  # 0: no HTTP endpoint


@dataclass(frozen=True)
class Site:
    id: str
    name: str
    timezone: str


@dataclass(frozen=True)
class Zone:
    id: str
    site: str
    name: str
    setpoint_c: float
    profile: Profile
    positions: tuple[Position, ...]


@dataclass(frozen=True)
class Alerting:
    repeat_s: float = 3600.0
    escalate_s: float = 1800.0
    retry_first_s: float = 30.0
    rules: tuple[Rule, ...] = tuple(default_rules())


@dataclass(frozen=True)
class Events:
    infer_defrosts: bool = True
    defrost: DefrostShape = DefrostShape()
    excursion_k: float = 3.0
    excursion_min_s: float = 20 * 60.0
    analyse_every_s: float = 15 * 60.0


@dataclass(frozen=True)
class Reports:
    dir: str
    enabled: bool = True
    weekday: int = 0  # Monday
    at_minutes: int = 6 * 60  # 06:00 site time
    formats: tuple[str, ...] = ("html", "csv", "json")


WEEKDAYS = ("monday", "tuesday", "wednesday", "thursday", "friday", "saturday", "sunday")


def default_reports_dir() -> str:
    state = os.environ.get("STATE_DIRECTORY")
    return str(Path(state.split(":")[0]) / "reports") if state else "reports"


@dataclass(frozen=True)
class Config:
    path: str
    broker: Broker
    storage: Storage
    ingest: Ingest
    health: Health
    sites: tuple[Site, ...]
    zones: tuple[Zone, ...]
    sources: tuple[Source, ...]
    alerting: Alerting = Alerting()
    events: Events = Events()
    channels: tuple[Channel, ...] = ()
    reports: Reports = field(default_factory=lambda: Reports(default_reports_dir()))

    def zone(self, zone_id: str) -> Zone | None:
        return next((z for z in self.zones if z.id == zone_id), None)

    def site_of(self, zone_id: str) -> Site:
        z = self.zone(zone_id)
        site = next((s for s in self.sites if z is not None and s.id == z.site), None)
        return site or Site("site", "", "UTC")


class _Reader:
    """Typed access to one TOML table with the key path in every message."""

    def __init__(self, file: str, table: dict, where: str):
        self.file, self.table, self.where = file, table, where
        self.used: set[str] = set()

    def fail(self, key: str, value, expected: str):
        path = f"{self.where}.{key}" if self.where else key
        if _secret_shaped(key):
            value = "(not shown: the key may hold a secret)"
        raise ConfigError(f"{self.file}: {path}", value, expected)

    def get(self, key, kinds, default, expected):
        self.used.add(key)
        if RECORDER is not None:  # the configuration reference (watcher.config_doc) is made from these
            RECORDER.append((self.where, key, default, expected))
        if key not in self.table:
            if default is _REQUIRED:
                self.fail(key, None, expected + " (required)")
            return default
        value = self.table[key]
        if isinstance(value, bool) and bool not in kinds or not isinstance(value, kinds):
            self.fail(key, value, expected)
        return value

    def text(self, key, default=None):
        return self.get(key, (str,), default, "a string")

    def number(self, key, default=None, lo=-math.inf, hi=math.inf):
        v = self.get(key, (int, float), default, f"a number in [{lo}, {hi}]")
        if v is not None and (not math.isfinite(float(v)) or not lo <= v <= hi):
            self.fail(key, v, f"a number in [{lo}, {hi}]")
        return None if v is None else float(v)

    def integer(self, key, default=None, lo=-(2**62), hi=2**62):
        v = self.get(key, (int,), default, f"a whole number in [{lo}, {hi}]")
        if v is not None and not lo <= v <= hi:
            self.fail(key, v, f"a whole number in [{lo}, {hi}]")
        return v

    def sub(self, key) -> _Reader:
        value = self.get(key, (dict,), {}, "a table")
        return _Reader(self.file, value, f"{self.where}.{key}" if self.where else key)

    def done(self):
        for key in self.table:
            if key not in self.used:
                self.fail(key, self.table[key], "no such key (see config.example.toml)")


_REQUIRED = object()
_SECRET_WORD = re.compile(
    r"(^|_)(pass|passwd|password|passphrase|secret|token|api_?key|key|auth|bearer|cred|credentials?)($|_)"
)


def _secret_shaped(key: str) -> bool:
    """A key whose value may be a secret (a stray `password`, a `url` beside `url_file`): a
    refusal never echoes it. Keys naming a file or a credential hold paths and names."""
    if key.endswith(("_file", "_credential", "_path")):
        return False
    return key in ("url", "uri", "dsn") or bool(_SECRET_WORD.search(key))


RECORDER: list | None = None


def _secret(file: str, r: _Reader, file_key: str, cred_key: str) -> str | None:
    path = r.text(file_key)
    cred = r.text(cred_key)
    if path and cred:
        r.fail(cred_key, cred, f"only one of {file_key} and {cred_key}")
    if cred:
        folder = os.environ.get("CREDENTIALS_DIRECTORY")
        if not folder:
            r.fail(cred_key, cred, "a credential name with $CREDENTIALS_DIRECTORY set (systemd LoadCredential=)")
        path = str(Path(folder) / cred)
    if not path:
        return None
    try:
        if Path(path).stat().st_mode & 0o004:
            log.warning("%s: %s is readable by every user; make it 0600 (it holds a secret)", file, path)
        return Path(path).read_text(encoding="utf-8").strip()
    except OSError as exc:
        r.fail(file_key if not cred else cred_key, path, f"a readable file ({exc.strerror})")
    return None


def default_db_path() -> str:
    state = os.environ.get("STATE_DIRECTORY")
    return str(Path(state.split(":")[0]) / "watcher.db") if state else "watcher.db"


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
    from watcher.files.profiles import load_profile

    root = _Reader(path, data, "")
    b = root.sub("broker")
    tls_r = b.sub("tls")
    tls = None
    if "tls" in b.table:  # present, even empty: TLS is wanted and must never fall back to plain text
        tls = Tls(
            ca_file=tls_r.text("ca_file", _REQUIRED), cert_file=tls_r.text("cert_file"), key_file=tls_r.text("key_file")
        )
        if bool(tls.cert_file) != bool(tls.key_file):
            tls_r.fail("key_file", tls.key_file, "cert_file and key_file together")
        for key in ("ca_file", "cert_file", "key_file"):
            value = getattr(tls, key)
            if value is not None and not (value.strip() and Path(value).is_file()):
                tls_r.fail(
                    key,
                    value,
                    "an existing file" + (" (the CA that signed the broker's certificate)" if key == "ca_file" else ""),
                )
        tls_r.done()
    status_topic = b.text("status_topic", "watcher/status")
    ack_topic = b.text("ack_topic", "watcher/ack")
    lot_topic = b.text("lot_topic", "watcher/lots")
    for key, topic in (("status_topic", status_topic), ("ack_topic", ack_topic), ("lot_topic", lot_topic)):
        if not topic_is_clean(topic):
            b.fail(key, topic, "a topic without wildcards, control characters or empty levels")
    broker = Broker(
        host=b.text("host", "127.0.0.1"),
        port=int(b.integer("port", 1883, 1, 65535)),
        client_id=b.text("client_id", "watcher"),
        keepalive_s=int(b.integer("keepalive_s", 30, 5, 3600)),
        username=b.text("username"),
        password=_secret(path, b, "password_file", "password_credential"),
        session_expiry_s=int(b.integer("session_expiry_s", 7 * 86400, 60, 2**32 - 1)),
        receive_maximum=int(b.integer("receive_maximum", 1000, 1, 65535)),
        status_topic=status_topic,
        ack_topic=ack_topic,
        lot_topic=lot_topic,
        reconnect_min_s=b.number("reconnect_min_s", 1.0, 0.05, 600),
        reconnect_max_s=b.number("reconnect_max_s", 60.0, 0.05, 3600),
        tls=tls,
    )
    if not broker.client_id.strip():
        b.fail("client_id", broker.client_id, "a stable, unique, non-empty client id")
    b.done()

    s = root.sub("storage")
    storage = Storage(
        path=s.text("path", default_db_path()), raw_retention_days=int(s.integer("raw_retention_days", 400, 366, 36500))
    )
    s.done()

    i = root.sub("ingest")
    lo_hi = i.get("temperature_range_c", (list,), [-60.0, 40.0], "a list [low, high] in C")
    if (
        len(lo_hi) != 2
        or not all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in lo_hi)
        or lo_hi[0] >= lo_hi[1]
    ):
        i.fail("temperature_range_c", lo_hi, "a list [low, high] of numbers with low < high")
    ingest = Ingest(
        reorder_window_s=i.number("reorder_window_s", 120.0, 0.0, 86400.0),
        max_gap_s=i.number("max_gap_s", 900.0, 10.0, 7 * 86400.0),
        batch_max=int(i.integer("batch_max", 1000, 1, 100000)),
        batch_wait_s=i.number("batch_wait_s", 0.02, 0.0, 5.0),
        stall_limit_s=i.number("stall_limit_s", 600.0, 10.0, 86400.0),
        hold_days=i.number("hold_days", 7.0, 0.01, 400.0),
        hold_max=int(i.integer("hold_max", 100_000, 0, 10_000_000)),
        max_sensors_per_zone=int(i.integer("max_sensors_per_zone", 64, 1, 10_000)),
        rejections_per_topic_per_min=int(i.integer("rejections_per_topic_per_min", 60, 0, 1_000_000)),
        limits=Limits(
            max_payload_bytes=int(i.integer("max_payload_bytes", 65536, 64, 16 * 1024 * 1024)),
            future_skew_s=i.number("future_skew_s", 300.0, 0.0, 86400.0),
            past_limit_s=i.number("past_limit_days", 400.0, 1.0, 36500.0) * 86400.0,
            temp_range_c=(float(lo_hi[0]), float(lo_hi[1])),
        ),
    )
    i.done()
    if ingest.limits.past_limit_s > storage.raw_retention_days * 86400.0:
        root.fail(
            "ingest.past_limit_days",
            ingest.limits.past_limit_s / 86400.0,
            f"at most storage.raw_retention_days ({storage.raw_retention_days}): older readings could no longer be merged in order",
        )

    h = root.sub("health")
    health = Health(host=h.text("host", "127.0.0.1"), port=int(h.integer("port", 9108, 0, 65535)))
    h.done()

    sites = []
    for k, raw in enumerate(root.get("sites", (list,), [], "a list of [[sites]] tables")):
        r = _Reader(path, raw if isinstance(raw, dict) else {}, f"sites[{k}]")
        tz = r.text("timezone", "UTC")
        try:
            ZoneInfo(tz)
        except (ZoneInfoNotFoundError, ValueError):
            r.fail("timezone", tz, "an IANA time zone such as Europe/London")
        sites.append(Site(id=_ident(r, "id"), name=r.text("name", ""), timezone=tz))
        r.done()
    site_ids = {x.id for x in sites}
    if len(site_ids) != len(sites):
        root.fail("sites", [x.id for x in sites], "unique site ids")

    zones = []
    for k, raw in enumerate(root.get("zones", (list,), _REQUIRED, "a list of [[zones]] tables")):
        r = _Reader(path, raw if isinstance(raw, dict) else {}, f"zones[{k}]")
        zid = _ident(r, "id")
        site = r.text("site", sites[0].id if len(sites) == 1 else None)
        if site not in site_ids:
            r.fail("site", site, "one of the [[sites]] ids: " + ", ".join(sorted(site_ids)))
        prof_name = r.text("profile", "dairy-ice-cream")
        try:
            profile = load_profile(prof_name)
        except ProfileError as exc:
            r.fail("profile", prof_name, f"a usable profile ({exc})")
        zones.append(
            Zone(
                id=zid,
                site=site,
                name=r.text("name", zid),
                setpoint_c=r.number("setpoint_c", _REQUIRED, -60.0, 0.0),
                profile=profile,
                positions=_positions(r),
            )
        )
        r.done()
    if not zones:
        root.fail("zones", [], "at least one [[zones]] table")
    zone_ids = [z.id for z in zones]
    if len(set(zone_ids)) != len(zone_ids):
        root.fail("zones", zone_ids, "unique zone ids")

    sources = []
    for k, raw in enumerate(root.get("sources", (list,), _REQUIRED, "a list of [[sources]] tables")):
        r = _Reader(path, raw if isinstance(raw, dict) else {}, f"sources[{k}]")
        sources.append(_source(r, set(zone_ids)))
        r.done()
    if not sources:
        root.fail("sources", [], "at least one [[sources]] table")
    alerting = _alerting(root.sub("alerts"), set(zone_ids))
    events = _events(root.sub("events"))
    channels = _channels(root)
    reports = _reports(root.sub("reports"))
    root.done()
    return Config(
        path,
        broker,
        storage,
        ingest,
        health,
        tuple(sites),
        tuple(zones),
        tuple(sources),
        alerting,
        events,
        channels,
        reports,
    )


def _reports(r: _Reader) -> Reports:
    day = r.text("weekday", "monday")
    if day not in WEEKDAYS:
        r.fail("weekday", day, "a weekday name: " + ", ".join(WEEKDAYS))
    at = r.text("at", "06:00")
    try:
        hh, mm = (int(x) for x in at.split(":"))
        if not (0 <= hh < 24 and 0 <= mm < 60):
            raise ValueError
    except ValueError:
        r.fail("at", at, "a site-local time HH:MM")
    formats = r.get("formats", (list,), ["html", "csv", "json"], "a list among html, csv, json")
    if not formats or any(f not in ("html", "csv", "json") for f in formats):
        r.fail("formats", formats, "a non-empty list among html, csv, json")
    reports = Reports(
        dir=r.text("dir", default_reports_dir()),
        enabled=r.get("enabled", (bool,), True, "true or false"),
        weekday=WEEKDAYS.index(day),
        at_minutes=hh * 60 + mm,
        formats=tuple(formats),
    )
    r.done()
    return reports


def _alerting(r: _Reader, zone_ids: set[str]) -> Alerting:
    rules = {rule.id: rule for rule in default_rules()}
    off = r.get("disable", (list,), [], "a list of rule ids")
    for rule_id in off:
        if rule_id not in rules:
            r.fail("disable", rule_id, "ids of default rules: " + ", ".join(rules))
    for k, raw in enumerate(r.get("rules", (list,), [], "a list of [[alerts.rules]] tables")):
        rr = _Reader(r.file, raw if isinstance(raw, dict) else {}, f"alerts.rules[{k}]")
        rid = _ident(rr, "id")
        base = rules.get(rid)
        if base is None and not {"metric"} <= set(rr.table) or base is None and not {"above", "below"} & set(rr.table):
            rr.fail("id", rid, "a default rule id to change, or a new rule with metric and above or below")
        metric = rr.text("metric", base.metric if base else None)
        if metric not in METRICS:
            rr.fail("metric", metric, "one of " + ", ".join(METRICS))
        above, below = rr.number("above"), rr.number("below")
        if above is not None and below is not None:
            rr.fail("below", below, "either above or below, not both")
        op, threshold = (">=", above) if above is not None else ("<=", below) if below is not None else (None, None)
        severity = rr.text("severity", base.severity if base else "warning")
        if severity not in SEVERITIES:
            rr.fail("severity", severity, "one of " + ", ".join(SEVERITIES))
        zones = tuple(rr.get("zones", (list,), list(base.zones) if base else [], "a list of zone ids"))
        for z in zones:
            if z not in zone_ids:
                rr.fail("zones", z, "ids of [[zones]]: " + ", ".join(sorted(zone_ids)))
        for_min = rr.number("for_min", base.for_s / 60.0 if base else 0.0, 0.0, 7 * 1440.0)
        hysteresis = rr.number("hysteresis", base.hysteresis if base else 0.0, 0.0)
        op = op or base.op
        threshold = threshold if threshold is not None else base.threshold
        if op == ">=" and metric not in ("air_c", "product_c") and hysteresis >= threshold:
            rr.fail("hysteresis", hysteresis, f"less than the threshold {threshold:g}, or the alert could never clear")
        unchanged = base is not None and (metric, op, threshold, for_min * 60.0) == (
            base.metric,
            base.op,
            base.threshold,
            base.for_s,
        )
        rules[rid] = Rule(
            id=rid,
            metric=metric,
            op=op,
            threshold=threshold,
            severity=severity,
            for_s=for_min * 60.0,
            hysteresis=hysteresis,
            clear_for_s=rr.number("clear_after_min", base.clear_for_s / 60.0 if base else 0.0, 0.0, 7 * 1440.0) * 60.0,
            latch=metric_named(metric).latch,  # texture damage does not heal, whatever the threshold
            label=rr.text("label", base.label if unchanged else auto_label(metric, op, threshold, for_min * 60.0)),
            zones=zones,
        )
        rr.done()
    alerting = Alerting(
        repeat_s=r.number("repeat_min", 60.0, 0.1, 7 * 1440.0) * 60.0,
        escalate_s=r.number("escalate_min", 30.0, 0.1, 7 * 1440.0) * 60.0,
        retry_first_s=r.number("retry_first_s", 30.0, 0.1, 3600.0),
        rules=tuple(rule for rid, rule in rules.items() if rid not in off),
    )
    r.done()
    return alerting


def _events(r: _Reader) -> Events:
    d = DefrostShape()
    shape = DefrostShape(
        rise_k=r.number("defrost_rise_k", d.rise_k, 0.1, 30.0),
        min_s=r.number("defrost_min_min", d.min_s / 60.0, 1.0, 600.0) * 60.0,
        max_s=r.number("defrost_max_min", d.max_s / 60.0, 1.0, 600.0) * 60.0,
    )
    if shape.min_s >= shape.max_s:
        r.fail("defrost_max_min", shape.max_s / 60.0, "more than defrost_min_min")
    events = Events(
        infer_defrosts=r.get("infer_defrosts", (bool,), True, "true or false"),
        defrost=shape,
        excursion_k=r.number("excursion_k", 3.0, 0.5, 40.0),
        excursion_min_s=r.number("excursion_min_min", 20.0, 1.0, 1440.0) * 60.0,
        analyse_every_s=r.number("analyse_every_min", 15.0, 1.0, 1440.0) * 60.0,
    )
    r.done()
    return events


def _channels(root: _Reader) -> tuple[Channel, ...]:
    out = []
    for k, raw in enumerate(root.get("notify", (list,), [], "a list of [[notify]] tables")):
        r = _Reader(root.file, raw if isinstance(raw, dict) else {}, f"notify[{k}]")
        name = _ident(r, "name")
        url = _secret(root.file, r, "url_file", "url_credential")
        if not url:
            r.fail("url_file", None, "url_file or url_credential: a file holding one apprise URL")
        tags = r.get("tags", (list,), ["alerts"], "a list of tags such as alerts, critical, escalation, reports")
        if not tags or not all(isinstance(t, str) and t for t in tags):
            r.fail("tags", tags, "a non-empty list of tag names")
        from watcher.alerts.delivery import usable  # apprise loads only when channels are configured

        if not usable(url):
            r.fail("url_file", "(not shown)", "a file holding one URL that apprise can use")
        from watcher.alerts.secrets import insecure_options

        insecure = insecure_options(url)
        if insecure and not r.get(
            "allow_insecure_tls", (bool,), False, "true to accept a URL that turns TLS checks off"
        ):
            r.fail(
                "url_file",
                ", ".join(insecure),
                "a URL that checks the receiver's TLS certificate (or allow_insecure_tls = true on this channel)",
            )
        out.append(Channel(name, url, tuple(tags), r.number("min_interval_s", None, 0.0, 3600.0)))
        r.done()
    names = [c.name for c in out]
    if len(set(names)) != len(names):
        root.fail("notify", names, "unique channel names")
    return tuple(out)


def _ident(r: _Reader, key: str) -> str:
    value = r.text(key, _REQUIRED)
    if not value or not all(c.isalnum() or c in "-_" for c in value):
        r.fail(key, value, "an id of letters, digits, '-' and '_'")
    return value


def _positions(r: _Reader) -> tuple[Position, ...]:
    raw = r.get("positions", (list,), None, "a list of {name, tau_h} or {name, probe = true} tables")
    if raw is None:
        return DEFAULT_POSITIONS
    out = []
    for k, item in enumerate(raw):
        p = _Reader(r.file, item if isinstance(item, dict) else {}, f"{r.where}.positions[{k}]")
        name = _ident(p, "name")
        probe = p.get("probe", (bool,), False, "true or false")
        tau_h = p.number("tau_h", None if probe else _REQUIRED, 0.01, 500.0)
        out.append(Position(name, (tau_h or 0.0) * 3600.0, probe=probe))
        p.done()
    if not out or len({x.name for x in out}) != len(out):
        r.fail("positions", raw, "at least one position, names unique")
    return tuple(out)


def _source(r: _Reader, zone_ids: set[str]) -> Source:
    text = r.text("pattern", _REQUIRED)
    try:
        pattern = parse_pattern(text)
    except ValueError as exc:
        r.fail("pattern", text, str(exc))
    signal = r.text("signal", _REQUIRED)
    if signal not in SIGNALS:
        r.fail("signal", signal, "one of " + ", ".join(SIGNALS))
    fixed_zone = r.text("zone")
    if "zone" not in pattern.placeholders and not fixed_zone:
        r.fail("zone", None, "a zone id, or a {zone} placeholder in the pattern")
    if fixed_zone and fixed_zone not in zone_ids:
        r.fail("zone", fixed_zone, "one of the [[zones]] ids")
    unknown = pattern.placeholders - {"zone", "sensor", "site"}
    if unknown:
        r.fail("pattern", text, "placeholders among {site}, {zone}, {sensor}")
    fmt = r.text("format", "json")
    if fmt not in ("json", "number"):
        r.fail("format", fmt, "json or number")
    unit = r.text("unit", "C")
    if unit not in ("C", "F", "K"):
        r.fail("unit", unit, "C, F or K")
    unit_path = r.text("unit_field")
    if unit_path and fmt == "number":
        r.fail("unit_field", unit_path, "no unit field for plain-number payloads (use unit)")
    time_path = r.text("time")
    time_format = r.text("time_format", "iso")
    if time_format not in ("iso", "epoch_s", "epoch_ms"):
        r.fail("time_format", time_format, "iso, epoch_s or epoch_ms")
    if fmt == "number" and time_path:
        r.fail("time", time_path, "no timestamp field for plain-number payloads (the receive time is used)")
    return Source(
        pattern=pattern,
        signal=signal,
        fmt=fmt,
        value_path=tuple(r.text("value", "value").split(".")),
        unit=unit,
        unit_path=tuple(unit_path.split(".")) if unit_path else None,
        time_path=tuple(time_path.split(".")) if time_path else None,
        time_format=time_format,
        zone=fixed_zone,
        sensor=r.text("sensor"),
    )
