"""The configuration tables that need more than a type and a range: alert rules (changes to
the defaults, new rules), notification channels, exposure positions, MQTT sources and the
report schedule. Every refusal goes through Reader.fail (file, key path, value, expected)."""

from __future__ import annotations

import logging

from watcher.alerts.channels import Channel
from watcher.alerts.messages import auto_label
from watcher.alerts.metrics import metric as metric_named
from watcher.alerts.policy import METRICS, RETIRED_RULES, SEVERITIES, Rule, default_rules
from watcher.alerts.secrets import insecure_options
from watcher.config.reader import REQUIRED, Reader, choice_text, read_secret
from watcher.config.settings import REPORT_FORMATS, WEEKDAYS, Alerting, Events, Reports
from watcher.events.detect import DefrostShape
from watcher.ingest.payload import FORMATS, SIGNALS, Source
from watcher.ingest.topics import ZONE_TEMPLATE, parse_pattern
from watcher.model.integrator import DEFAULT_POSITIONS, Position

log = logging.getLogger("watcher.config")


def reports(r: Reader) -> Reports:
    day = r.text("weekday", "monday", "due on this day after the ISO week ends ...")
    if day not in WEEKDAYS:
        r.fail("weekday", day, "a weekday name: " + ", ".join(WEEKDAYS))
    at = r.text("at", "06:00", "... at this site-local time (HH:MM)")
    try:
        hh, mm = (int(x) for x in at.split(":"))
        if not (0 <= hh < 24 and 0 <= mm < 60):
            raise ValueError
    except ValueError:
        r.fail("at", at, "a site-local time HH:MM")
    formats = r.get(
        "formats",
        (list,),
        list(REPORT_FORMATS),
        "a list among html, csv, json",
        'the HTML is mailed to channels tagged "reports"',
    )
    if not formats or any(f not in REPORT_FORMATS for f in formats):
        r.fail("formats", formats, "a non-empty list among html, csv, json")
    out = Reports(**r.declared(Reports), weekday=WEEKDAYS.index(day), at_minutes=hh * 60 + mm, formats=tuple(formats))
    r.done()
    return out


def events(r: Reader) -> Events:
    shape = DefrostShape(**r.declared(DefrostShape))
    if shape.min_s >= shape.max_s:
        r.fail("defrost_max_min", shape.max_s / 60.0, "more than defrost_min_min")
    out = Events(**r.declared(Events), defrost=shape)
    r.done()
    return out


def alerting(r: Reader, zone_ids: set[str]) -> Alerting:
    rules = {rule.id: rule for rule in default_rules()}
    off = r.get("disable", (list,), [], "a list of rule ids", "default rules switched off, by id")
    for rule_id in off:
        if rule_id in RETIRED_RULES:
            log.warning(
                "%s: alerts.disable names %s, no longer a default rule (%s)", r.file, rule_id, RETIRED_RULES[rule_id]
            )
        elif rule_id not in rules:
            r.fail("disable", rule_id, "ids of default rules: " + ", ".join(rules))
    for rr in r.items("rules", [], "a list of [[alerts.rules]] tables"):
        rule = _rule(rr, rules, zone_ids)
        rules[rule.id] = rule
        rr.done()
    out = Alerting(**r.declared(Alerting), rules=tuple(rule for rid, rule in rules.items() if rid not in off))
    r.done()
    return out


def _rule(rr: Reader, rules: dict[str, Rule], zone_ids: set[str]) -> Rule:
    rid = rr.ident("id", "a default rule's id to change it, or a new id (then metric and above or below)")
    base = rules.get(rid)
    if base is None and not {"metric"} <= set(rr.table) or base is None and not {"above", "below"} & set(rr.table):
        retired = f" ({rid} is no longer a default rule: {RETIRED_RULES[rid]})" if rid in RETIRED_RULES else ""
        rr.fail("id", rid, "a default rule id to change, or a new rule with metric and above or below" + retired)
    metric = rr.text("metric", base.metric if base else None, "a metric from docs/alerts.md")
    if metric not in METRICS:
        rr.fail("metric", metric, "one of " + ", ".join(METRICS))
    above = rr.number("above", doc="the threshold, in the metric's unit: raised at or above it")
    below = rr.number("below", doc="the threshold: raised at or below it")
    if above is not None and below is not None:
        rr.fail("below", below, "either above or below, not both")
    op, threshold = (">=", above) if above is not None else ("<=", below) if below is not None else (None, None)
    severity = rr.text("severity", base.severity if base else "warning", "info, warning or critical")
    if severity not in SEVERITIES:
        rr.fail("severity", severity, "one of " + ", ".join(SEVERITIES))
    zones = tuple(
        rr.get("zones", (list,), list(base.zones) if base else [], "a list of zone ids", "leave out for every zone")
    )
    for z in zones:
        if z not in zone_ids:
            rr.fail("zones", z, "ids of [[zones]]: " + ", ".join(sorted(zone_ids)))
    for_min = rr.number(
        "for_min",
        base.for_s / 60.0 if base else 0.0,
        0.0,
        7 * 1440.0,
        "the condition must hold this long before the alert is raised",
    )
    hysteresis = rr.number(
        "hysteresis",
        base.hysteresis if base else 0.0,
        0.0,
        doc="how far back past the threshold the value must come to clear",
    )
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
    clear_min = rr.number(
        "clear_after_min",
        base.clear_for_s / 60.0 if base else 0.0,
        0.0,
        7 * 1440.0,
        "back past the hysteresis for this long before it clears",
    )
    label = rr.text(
        "label",
        base.label if unchanged else auto_label(metric, op, threshold, for_min * 60.0),
        "the message's headline",
    )
    return Rule(
        id=rid,
        metric=metric,
        op=op,
        threshold=threshold,
        severity=severity,
        for_s=for_min * 60.0,
        hysteresis=hysteresis,
        clear_for_s=clear_min * 60.0,
        latch=metric_named(metric).latch,  # texture damage does not heal, whatever the threshold
        label=label,
        zones=zones,
    )


def channels(root: Reader) -> tuple[Channel, ...]:
    out = []
    for r in root.items("notify", [], "a list of [[notify]] tables"):
        name = r.ident("name", "the channel's name in logs and `watcher test-notify`")
        url = read_secret(r, "url_file", "url_credential", "one apprise URL")
        if not url:
            r.fail("url_file", None, "url_file or url_credential: a file holding one apprise URL")
        tags = r.get(
            "tags",
            (list,),
            ["alerts"],
            "a list of tags such as alerts, critical, escalation, reports",
            "the channel takes a message when they share a tag",
        )
        if not tags or not all(isinstance(t, str) and t for t in tags):
            r.fail("tags", tags, "a non-empty list of tag names")
        from watcher.alerts.delivery import usable  # apprise loads only when channels are configured

        if not usable(url):
            r.fail("url_file", "(not shown)", "a file holding one URL that apprise can use")

        insecure = insecure_options(url)
        allowed = r.flag("allow_insecure_tls", False, "true only to accept a URL that turns certificate checks off")
        if insecure and not allowed:
            r.fail(
                "url_file",
                ", ".join(insecure),
                "a URL that checks the receiver's TLS certificate (or allow_insecure_tls = true on this channel)",
            )
        spacing = r.number("min_interval_s", None, 0.0, 3600.0, "spacing between messages to this channel")
        out.append(Channel(name, url, tuple(tags), spacing))
        r.done()
    names = [c.name for c in out]
    if len(set(names)) != len(names):
        root.fail("notify", names, "unique channel names")
    return tuple(out)


def positions(r: Reader) -> tuple[Position, ...]:
    raw = r.get(
        "positions",
        (list,),
        None,
        "a list of {name, tau_h} or {name, probe = true} tables",
        "exposure positions: a first-order lag of the air (tau_h hours) or a product probe",
    )
    if raw is None:
        return DEFAULT_POSITIONS
    out = []
    for k, item in enumerate(raw):
        p = Reader(r.file, item if isinstance(item, dict) else {}, f"{r.where}.positions[{k}]")
        name = p.ident("name", "the position's name")
        probe = p.flag("probe", False, "true: the position is a product probe's readings")
        tau_h = p.number("tau_h", None if probe else REQUIRED, 0.01, 500.0, "the product's lag behind the air, hours")
        out.append(Position(name, (tau_h or 0.0) * 3600.0, probe=probe))
        p.done()
    if not out or len({x.name for x in out}) != len(out):
        r.fail("positions", raw, "at least one position, names unique")
    return tuple(out)


def source(r: Reader, zone_ids: set[str]) -> Source:
    text = r.text("pattern", REQUIRED, "a topic filter; {site}, {zone}, {sensor} fill whole levels")
    try:
        pattern = parse_pattern(text)
    except ValueError as exc:
        r.fail("pattern", text, str(exc))
    signal = _choice(r, "signal", REQUIRED, SIGNALS, "what the topic carries")
    fixed_zone = r.text(
        "zone",
        doc="a fixed zone id when the pattern has no {zone}; or the zone id made from the pattern's placeholders, "
        'e.g. "{site}-{zone}" (a central watcher of several sites whose zones share names)',
    )
    if "zone" not in pattern.placeholders and not fixed_zone:
        r.fail("zone", None, "a zone id, or a {zone} placeholder in the pattern")
    if pattern.placeholders - {"zone", "sensor", "site"}:
        r.fail("pattern", text, "placeholders among {site}, {zone}, {sensor}")
    if fixed_zone and ("{" in fixed_zone or "}" in fixed_zone):
        named, rest = ZONE_TEMPLATE.findall(fixed_zone), ZONE_TEMPLATE.sub("", fixed_zone)
        if not named or set(named) - pattern.placeholders or "{" in rest or "}" in rest:
            r.fail("zone", fixed_zone, f"a zone id, or a template of the placeholders of {text!r}")
    elif fixed_zone and fixed_zone not in zone_ids:
        r.fail("zone", fixed_zone, "one of the [[zones]] ids")
    fmt = _choice(
        r,
        "format",
        "json",
        tuple(FORMATS),
        "how the payload carries the value: a JSON object, a plain number, bare text (a number or a state word), "
        "a SenML pack (RFC 8428), or a Sparkplug B payload",
    )
    unit = _choice(r, "unit", "C", ("C", "F", "K"), "the temperature unit")
    unit_path = r.text("unit_field", doc="JSON field path of a unit the payload names itself; overrides unit")
    if unit_path and not FORMATS[fmt].fields:
        r.fail("unit_field", unit_path, f"no unit field for {fmt} payloads (use unit, or the payload's own)")
    time_path = r.text("time", doc="JSON field path of the timestamp; leave out to use the receive time")
    time_format = _choice(r, "time_format", "iso", ("iso", "epoch_s", "epoch_ms"), "how the timestamp is written")
    if time_path and not FORMATS[fmt].fields:
        r.fail("time", time_path, f"no timestamp field for {fmt} payloads (their own time or the receive time is used)")
    if fmt == "sparkplug":
        levels = text.split("/")
        if (
            len(levels) not in (4, 5)
            or levels[0] != "spBv1.0"
            or levels[2] != ("DDATA" if len(levels) == 5 else "NDATA")
        ):
            r.fail(
                "pattern",
                text,
                "a Sparkplug B data topic: spBv1.0/GROUP/DDATA/{zone}/{sensor} (a device) or spBv1.0/GROUP/NDATA/EDGE "
                "(an edge node); placeholders or names fill the edge node and device levels",
            )
        if "value" not in r.table:
            r.fail("value", None, "the name of the Sparkplug metric to take, as the birth certificate names it")
    if fmt == "senml" and "value" not in r.table:
        r.fail(
            "value",
            None,
            'the full name (base name + name) of the SenML record to take, e.g. "urn:dev:mac:0024befffe804ff1:temp"',
        )
    value = r.text(
        "value",
        "value",
        'JSON field path of the value, dot-separated ("reading.value"); for SenML the record\'s full name',
    )
    return Source(
        pattern=pattern,
        signal=signal,
        fmt=fmt,
        value_path=tuple(value.split(".")),
        unit=unit,
        unit_path=tuple(unit_path.split(".")) if unit_path else None,
        time_path=tuple(time_path.split(".")) if time_path else None,
        time_format=time_format,
        zone=fixed_zone,
        sensor=r.text("sensor", doc="fixed sensor name when the pattern has no {sensor}"),
    )


def _choice(r: Reader, key: str, default, choices: tuple[str, ...], doc: str) -> str:
    value = r.text(key, default, doc)
    if value not in choices:
        r.fail(key, value, choice_text(choices))
    return value
