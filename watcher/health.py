"""Health and metrics over HTTP on loopback: /healthz, /readyz, /metrics (Prometheus text) and
the site page at / (report/page.py, rendered on request and kept a minute).

prometheus-client with a private registry; the server binds to the configured host (127.0.0.1
by default; prometheus-client's own default would be every interface). Label sets are bounded:
result kinds, reason classes, and configured zone ids.
"""

from __future__ import annotations

import json
import logging
import threading
import time
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram, generate_latest
from prometheus_client.core import GaugeMetricFamily

log = logging.getLogger("watcher.health")

CONTENT_TYPE = "text/plain; version=0.0.4; charset=utf-8"


class Metrics:
    def __init__(self) -> None:
        self.registry = CollectorRegistry()
        r = self.registry
        self.readings = Counter("watcher_readings", "Messages by result", ["result"], registry=r)
        self.rejections = Counter("watcher_rejections", "Rejected messages by reason class", ["reason"], registry=r)
        self.reconnects = Counter(
            "watcher_mqtt_connects", "Successful MQTT connections (first one included)", registry=r
        )
        self.commit_seconds = Histogram(
            "watcher_commit_seconds",
            "Time to store, feed and commit one batch",
            registry=r,
            buckets=(0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 10.0),
        )
        self.commit_failures = Counter(
            "watcher_commit_failures", "Batches whose commit failed and will be retried", registry=r
        )
        self.queue_depth = Gauge("watcher_queue_depth", "Messages received but not yet committed", registry=r)
        self.queue_peak = Gauge("watcher_queue_depth_peak", "Highest queue depth since start", registry=r)
        self.ack_seconds = Histogram(
            "watcher_ack_seconds",
            "From a message's arrival at watcher to its acknowledgement being handed to the broker link "
            "(after its reading or rejection is committed)",
            registry=r,
            buckets=(0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0, 60.0),
        )
        self.notifications = Counter(
            "watcher_notifications", "Notification attempts by outcome (sent, retried, failed)", ["outcome"], registry=r
        )
        self.report_checks = Counter(
            "watcher_report_checks",
            "Checks of the weekly summary schedule, by outcome (produced, nothing_due, failed)",
            ["outcome"],
            registry=r,
        )
        self.zone_figures: dict[str, dict] = {}
        self.zone_last_ts: dict[str, float] = {}
        self.zone_air_c: dict[str, float] = {}
        self.open_alerts: dict[str, int] = {}  # severity -> open (or acknowledged, not cleared) alerts
        r.register(_ZoneCollector(self))


class _ZoneCollector:
    """Per-zone gauges computed at scrape time."""

    def __init__(self, metrics: Metrics):
        self.m = metrics

    def collect(self):
        age = GaugeMetricFamily(
            "watcher_zone_last_reading_age_seconds", "Seconds since the zone's newest reading", labels=["zone"]
        )
        now = time.time()
        for zone, ts in sorted(self.m.zone_last_ts.items()):
            age.add_metric([zone], max(0.0, now - ts))
        yield age
        air = GaugeMetricFamily("watcher_zone_air_celsius", "The zone's newest air temperature", labels=["zone"])
        for zone, value in sorted(self.m.zone_air_c.items()):
            air.add_metric([zone], value)
        yield air
        figures = dict(sorted(self.m.zone_figures.items()))
        for name, doc, key, scale in ZONE_FIGURES:
            family = GaugeMetricFamily(name, doc, labels=["zone"])
            for zone, fig in figures.items():
                if fig.get(key) is not None:
                    family.add_metric([zone], fig[key] * scale)
            yield family
        alerts = GaugeMetricFamily(
            "watcher_open_alerts", "Alerts raised and not yet cleared (acknowledged included)", labels=["severity"]
        )
        for severity, n in sorted(self.m.open_alerts.items()):
            alerts.add_metric([severity], n)
        yield alerts


# Gauges read from each zone's figures: (name, help, figures key, scale to the base unit).
ZONE_FIGURES = (
    (
        "watcher_zone_product_celsius",
        "Estimated product temperature (warmest position; a model estimate, not a probe reading)",
        "product_c",
        1.0,
    ),
    (
        "watcher_zone_mean_crystal_diameter_meters",
        "Mean ice crystal diameter (worst position)",
        "mean_diameter_um",
        1e-6,
    ),
    ("watcher_zone_budget_used_ratio", "Texture budget used (worst position), 0..1+", "budget_used_pct", 0.01),
    (
        "watcher_zone_time_to_limit_seconds",
        "Time to the texture limit if the product stayed at its current temperature (+Inf: never)",
        "days_to_limit",
        86400.0,
    ),
    (
        "watcher_zone_time_to_limit_cautious_seconds",
        "The cautious (lower) end of the 90 % range of the time to the texture limit",
        "days_to_limit_low",
        86400.0,
    ),
)


REQUEST_TIMEOUT_S = 10.0
MAX_CONNECTIONS = 16


class _BoundedServer(ThreadingHTTPServer):
    """At most MAX_CONNECTIONS served at once; more are closed at once. Idle sockets once held
    800 threads and file descriptors and starved alert delivery of descriptors."""

    daemon_threads = True

    def __init__(self, *args, **kw):
        self._slots = threading.BoundedSemaphore(MAX_CONNECTIONS)
        super().__init__(*args, **kw)

    def process_request(self, request, client_address):
        if not self._slots.acquire(blocking=False):
            self.shutdown_request(request)
            return
        try:
            super().process_request(request, client_address)
        except Exception:
            self._slots.release()
            raise

    def process_request_thread(self, request, client_address):
        try:
            super().process_request_thread(request, client_address)
        finally:
            self._slots.release()


class HealthServer:
    """Serves /healthz, /readyz and /metrics from a daemon thread."""

    def __init__(self, host: str, port: int, metrics: Metrics, health_fn, ready_fn, page_fn=None):
        metrics_ref, health, ready, page = metrics, health_fn, ready_fn, page_fn

        class Handler(BaseHTTPRequestHandler):
            timeout = REQUEST_TIMEOUT_S  # an idle or slow client is dropped after this

            def do_GET(self):  # noqa: N802 (http.server's name)
                if self.path == "/metrics":
                    self._send(200, generate_latest(metrics_ref.registry), CONTENT_TYPE)
                elif self.path in ("/healthz", "/readyz"):
                    ok, detail = (health if self.path == "/healthz" else ready)()
                    self._send(200 if ok else 503, json.dumps(detail).encode(), "application/json")
                elif self.path in ("/", "/index.html") and page is not None:
                    try:
                        body = page()
                    except Exception as exc:  # the page must never take the health endpoints with it
                        log.exception("site page failed")
                        self._send(500, f"the site page could not be made: {exc}\n".encode(), "text/plain")
                        return
                    self._send(200, body, "text/html; charset=utf-8")
                else:
                    self._send(404, b"not found\n", "text/plain")

            def _send(self, code, body, ctype):
                self.send_response(code)
                self.send_header("Content-Type", ctype)
                self.send_header("Content-Length", str(len(body)))
                self.end_headers()
                self.wfile.write(body)

            def log_message(self, *args):
                pass

        self.httpd = _BoundedServer((host, port), Handler)
        self.port = self.httpd.server_address[1]
        self.thread = threading.Thread(target=self.httpd.serve_forever, name="health", daemon=True)

    def start(self) -> None:
        self.thread.start()

    def stop(self) -> None:
        self.httpd.shutdown()
        self.httpd.server_close()
