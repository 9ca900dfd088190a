"""The alert metrics: one record per metric, read by the rules (policy.py), the notification
texts (messages.py), the monitor and the configuration. Pure.

A metric names what a rule watches, the words and unit it is shown with, what to check when it
fires, which clock judges it (the zone's data time, the service's clock, or per lot) and whether
it latches (texture damage does not heal, so a budget alert stays until acknowledged, also when
a site changes its threshold). Adding a metric is one entry here plus the observation that
feeds it (engine/monitor.py).
"""

from __future__ import annotations

from dataclasses import dataclass

CLOCKS = ("data", "wall", "lot")


@dataclass(frozen=True)
class Metric:
    name: str
    words: str  # "texture budget used": how a person reads the value
    check: str  # what to check when a rule on it fires
    unit: str  # "duration", "days", "count", "%", "um", "C", "K", "per hour" or "number"
    clock: str = "data"  # "data": the zone's newest reading; "wall": the service's clock; "lot": per lot
    latch: bool = False  # the condition cannot heal: an alert stays raised until acknowledged
    benchmark: bool = False  # a temperature judged against the -18 C benchmark (never a legal limit)
    # What a data-clock metric is read from, which sets the data times it is judged at
    # (engine/timeline.py): "readings" (the readings themselves), "model" (the integrator's
    # product temperature and budget) or "events" (the event analysis).
    source: str = "readings"

    def format(self, value: float | None, temp_unit: str = "C") -> str:
        """The value as a person reads it; temperatures (and differences) in temp_unit."""
        if value is None:
            return "unknown"
        if self.unit == "C":
            return temperature(value, temp_unit)
        if self.unit == "K" and temp_unit == "F":
            return f"{_unsigned_zero(value * 1.8, 1):.1f} F"
        if self.unit == "duration":
            return duration(value)
        if self.unit == "days":
            return f"{_unsigned_zero(value, 0):.0f} days"
        if self.unit == "count":
            return f"{_unsigned_zero(value, 0):.0f}"
        if self.unit == "um":
            return f"{_unsigned_zero(value, 2):.2f} um"
        if self.unit == "number":
            return f"{value:g}"
        return f"{_unsigned_zero(value, 1):.1f} {self.unit}"


def _unsigned_zero(value: float, decimals: int) -> float:
    """A value that rounds to zero is shown as 0, not -0 ("-0.0 %" after a cost fell away)."""
    return round(value, decimals) + 0.0


def temperature(value_c: float | None, unit: str = "C", none: str = "unknown") -> str:
    """A temperature held in celsius, shown in C or F ("-25.0 C", "-13.0 F")."""
    if value_c is None:
        return none
    value = value_c * 1.8 + 32.0 if unit == "F" else value_c
    return f"{_unsigned_zero(value, 1):.1f} {unit}"


def duration(seconds: float) -> str:
    seconds = max(0.0, float(seconds))
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    if seconds < 2 * 86400:
        return f"{seconds / 3600:.1f} h"
    return f"{seconds / 86400:.1f} days"


_ALL = (
    Metric(
        "budget_used_pct",
        "texture budget used",
        "Which lots sit in this zone and how long: ship the oldest first. The weekly summary shows where the budget went (defrosts, doors, excursions).",
        "%",
        latch=True,
        source="model",
    ),
    Metric(
        "days_to_limit",
        "days to the texture limit",
        "Whether the room runs warmer than its setpoint, and which lots will reach the limit first.",
        "days",
        source="model",
    ),
    Metric(
        "event_budget_share_pct",
        "one event's share of the budget",
        "The event listed below: was it a defrost that ran long, a door held open, a fault?",
        "%",
        source="events",
    ),
    Metric(
        "event_excess_um",
        "one event's extra crystal growth",
        "The event listed below: was it a defrost that ran long, a door held open, a fault?",
        "um",
        source="events",
    ),
    Metric(
        "air_c",
        "air temperature",
        "Evaporator and fans, a defrost that has not ended, the door and strip curtain, the compressor.",
        "C",
        benchmark=True,
    ),
    Metric(
        "product_c",
        "estimated product temperature",
        "Whether warm stock was loaded, and the air temperature record; check with a product probe.",
        "C",
        benchmark=True,
        source="model",
    ),
    Metric(
        "door_open_s", "door open", "The door: blocked open, a failed closer, the strip or air curtain.", "duration"
    ),
    Metric(
        "defrost_s", "defrost running", "The defrost termination (thermostat or timer) and the heaters.", "duration"
    ),
    Metric(
        "defrosts_today",
        "defrosts today",
        "The defrost controller's schedule; heavy frost can mean failing door seals or humid air.",
        "count",
        source="events",
    ),
    Metric(
        "sensor_spread_k",
        "air sensors disagree",
        "Sensor placement (one near a door or an evaporator outlet?) or a failing sensor; compare with a reference thermometer.",
        "K",
    ),
    Metric(
        "reading_age_s",
        "no reading",
        "The sensor's power or battery, its network link, and the gateway that publishes it.",
        "duration",
        clock="wall",
    ),
    Metric(
        "broker_down_s",
        "no broker connection",
        "The site broker and the network between it and this machine. Readings queue at the broker while the link is down.",
        "duration",
        clock="wall",
    ),
    Metric(
        "rejections_per_h",
        "rejected messages in the last hour",
        "`watcher status` and the rejections table: a sensor or gateway sending bad messages.",
        "per hour",
        clock="wall",
    ),
    Metric(
        "undelivered_s",
        "a notification channel failing",
        "The failing notification channel (its error is kept in the outbox table).",
        "duration",
        clock="wall",
    ),
    Metric(
        "commit_failing_s",
        "readings not stored",
        "Free disk space for the database, or a process holding it locked.",
        "duration",
        clock="wall",
    ),
    Metric(
        "clock_jump_s",
        "service clock jumped by",
        "The machine's time source (NTP, the real-time clock and its battery); `timedatectl` shows it. Times recorded around the jump may be off by its size.",
        "duration",
        clock="wall",
    ),
    Metric(
        "held_readings",
        "readings held for a clock disagreement",
        "Which clock is wrong: this machine's (`timedatectl`) or the gateway's. Held readings go in by themselves once the two agree; nothing is lost while they wait.",
        "number",
        clock="wall",
    ),
    Metric(
        "lot_budget_used_pct",
        "lot's texture budget used",
        "Ship this lot before fresher ones (`watcher lots` ranks them); look at where it has been stored (`watcher lot show`).",
        "%",
        clock="lot",
        latch=True,
    ),
    Metric(
        "lot_days_to_limit",
        "lot's days to the texture limit",
        "Ship this lot before fresher ones (`watcher lots` ranks them).",
        "days",
        clock="lot",
    ),
)
METRICS: dict[str, Metric] = {m.name: m for m in _ALL}
WALL_CLOCK = tuple(m.name for m in _ALL if m.clock == "wall")
PER_LOT = tuple(m.name for m in _ALL if m.clock == "lot")
FROM_READINGS, FROM_MODEL, FROM_EVENTS = (
    tuple(m.name for m in _ALL if m.clock == "data" and m.source == src) for src in ("readings", "model", "events")
)


def metric(name: str) -> Metric:
    """The metric of that name; a name from outside is checked by the configuration first."""
    return METRICS[name]
