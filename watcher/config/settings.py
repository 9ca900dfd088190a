"""The service's settings as frozen dataclasses, each configurable field declared once with
`setting(...)` (default, meaning, range, key in the file): the reader and the configuration
reference both come from these declarations. Broker, limits and defrost shape are declared in
their own layers (ingest.settings, ingest.payload, events.detect)."""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path

from watcher.alerts.channels import Channel
from watcher.alerts.policy import Rule, default_rules
from watcher.declare import setting
from watcher.events.detect import DefrostShape
from watcher.ingest.payload import Limits, Source
from watcher.ingest.settings import Broker
from watcher.model.integrator import Position
from watcher.model.profiles import Profile

WEEKDAYS = ("monday", "tuesday", "wednesday", "thursday", "friday", "saturday", "sunday")
REPORT_FORMATS = ("html", "csv", "json")


def _state_dir_file(name: str) -> str:
    state = os.environ.get("STATE_DIRECTORY")
    return str(Path(state.split(":")[0]) / name) if state else name


def default_db_path() -> str:
    """$STATE_DIRECTORY/watcher.db under systemd, else ./watcher.db."""
    return _state_dir_file("watcher.db")


def default_reports_dir() -> str:
    """$STATE_DIRECTORY/reports under systemd, else ./reports."""
    return _state_dir_file("reports")


@dataclass(frozen=True)
class Storage:
    path: str = setting(
        doc="the database file (default: $STATE_DIRECTORY/watcher.db under systemd, else ./watcher.db)",
        factory=default_db_path,
    )
    raw_retention_days: int = setting(
        400, "at least 366: temperature records must be kept a year (Reg. (EC) 37/2005)", lo=366, hi=36500
    )
    url: str | None = setting(
        None,
        "a PostgreSQL record instead of the file (a fleet's central record): postgresql://user@host:port/database, "
        "no password in it; `path` then only names the local working files beside it",
    )
    reader_url: str | None = setting(
        None,
        "the same PostgreSQL record as a read-only role, for what only reads it (status, the site page, verify, "
        "summaries shown again); default: url",
    )
    password: str | None = field(default=None, repr=False)  # from password_file or _credential, never the file
    reader_password: str | None = field(default=None, repr=False)  # reader_password_file or _credential

    @property
    def record(self) -> str:
        """Where the record is, for messages: the PostgreSQL URL (no password in it) or the file."""
        return self.url or self.path


@dataclass(frozen=True)
class Ingest:
    reorder_window_s: float = setting(
        120.0, "readings wait this long for stragglers before feeding the model", lo=0.0, hi=86400.0
    )
    max_gap_s: float = setting(
        900.0, "no air reading for longer than this is recorded as a data gap", lo=10.0, hi=7 * 86400.0
    )
    batch_max: int = setting(1000, "messages committed (then acknowledged) together", lo=1, hi=100000)
    batch_wait_s: float = setting(0.02, "how long a batch waits to fill", lo=0.0, hi=5.0)
    stall_limit_s: float = setting(
        600.0, "no commit for this long while messages wait: /healthz fails, the watchdog restarts", lo=10.0, hi=86400.0
    )
    hold_days: float = setting(
        7.0,
        "readings whose time disagrees with the service clock wait this long for the clocks to agree",
        lo=0.01,
        hi=400.0,
    )
    hold_max: int = setting(
        100_000, "at most this many held; beyond it they are rejected with the reason", lo=0, hi=10_000_000
    )
    max_sensors_per_zone: int = setting(
        64, "readings from further sensor names are rejected (a runaway gateway cannot slow the zone)", lo=1, hi=10_000
    )
    rejections_per_topic_per_min: int = setting(
        60, "stored one by one; beyond, one row per batch counts the rest (0: no limit)", lo=0, hi=1_000_000
    )
    limits: Limits = Limits()


@dataclass(frozen=True)
class Health:
    host: str = setting("127.0.0.1", "/healthz, /readyz and /metrics; keep it on loopback")
    port: int = setting(9108, "0 turns the endpoint off", lo=0, hi=65535)


@dataclass(frozen=True)
class Site:
    id: str = setting(doc="a short id of letters, digits, '-' and '_'", ident=True)
    name: str = setting("", "the site's name in messages and summaries")
    timezone: str = setting("UTC", "IANA name; used for daily and weekly figures")
    temp_unit: str = setting(
        "C",
        "temperatures in messages, `status` and `alerts`: C or F (configure and store in C; summaries stay in C)",
        choices=("C", "F"),
    )


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
    repeat_s: float = setting(
        3600.0,
        "remind about an unacknowledged alert this often (minutes)",
        key="repeat_min",
        scale=60.0,
        lo=0.1,
        hi=7 * 1440.0,
    )
    escalate_s: float = setting(
        1800.0,
        'then send it once to channels tagged "escalation" (minutes)',
        key="escalate_min",
        scale=60.0,
        lo=0.1,
        hi=7 * 1440.0,
    )
    retry_first_s: float = setting(
        30.0, "a failed notification is retried after this, doubling up to an hour", lo=0.1, hi=3600.0
    )
    rules: tuple[Rule, ...] = tuple(default_rules())


@dataclass(frozen=True)
class Events:
    infer_defrosts: bool = setting(True, "where a zone has no defrost signal, infer defrosts from the air pattern")
    defrost: DefrostShape = DefrostShape()
    excursion_k: float = setting(
        3.0, "warm time this far above the setpoint, explained by neither, is an excursion ...", lo=0.5, hi=40.0
    )
    excursion_min_s: float = setting(
        20 * 60.0, "... once it lasts this long (minutes)", key="excursion_min_min", scale=60.0, lo=1.0, hi=1440.0
    )
    analyse_every_s: float = setting(
        15 * 60.0,
        "events, their costs and the daily figures are brought up to date this often (model time, minutes)",
        key="analyse_every_min",
        scale=60.0,
        lo=1.0,
        hi=1440.0,
    )


@dataclass(frozen=True)
class Reports:
    dir: str = setting(
        doc="where summaries are written (default: $STATE_DIRECTORY/reports, else ./reports)",
        factory=default_reports_dir,
    )
    enabled: bool = setting(True, "the service writes each site's summary once it is due")
    weekday: int = 0  # Monday; read from the weekday's name
    at_minutes: int = 6 * 60  # 06:00 site time; read from "HH:MM"
    formats: tuple[str, ...] = REPORT_FORMATS


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
    reports: Reports = field(default_factory=Reports)

    def zone(self, zone_id: str) -> Zone | None:
        return next((z for z in self.zones if z.id == zone_id), None)

    def site_of(self, zone_id: str) -> Site:
        z = self.zone(zone_id)
        site = next((s for s in self.sites if z is not None and s.id == z.site), None)
        return site or Site("site", "", "UTC")
