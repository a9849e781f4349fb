"""Prometheus metrics of the service and a small health/metrics HTTP endpoint.

Each :class:`ServiceMetrics` has its own ``CollectorRegistry`` so several services in one
process (tests, the demo) do not collide. :class:`MetricsServer` serves ``/metrics``
(Prometheus text format), ``/healthz`` (JSON: connections, backlog, last commit, retries,
the problems found; HTTP 503 when not ok) and ``/readyz`` (JSON: ready or not and why;
503 when not ready) on ``service.metrics_address``; it is off unless that setting is given.
docs/service.md lists every metric and field.
"""

from __future__ import annotations

import json
import threading
from collections.abc import Callable, Mapping
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any

from prometheus_client import (
    CONTENT_TYPE_LATEST,
    CollectorRegistry,
    Counter,
    Gauge,
    Histogram,
    generate_latest,
)
from prometheus_client.core import GaugeMetricFamily

from monitor.redact import redact

#: Processing-time buckets, s: a 16,384-sample analysis takes a few ms.
TIME_BUCKETS = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 10.0)


class ServiceMetrics:
    """Counters and gauges: messages in (by kind), rejected (by reason), processing time,
    in flight, alarm transitions, alarms by state, database retries and errors, batch
    reruns, readings set aside, publish failures, notifications (by target); and, once :meth:`watch_health` is
    called, the health view's gauges read at each scrape."""

    def __init__(self) -> None:
        r = self.registry = CollectorRegistry()
        self.messages_in = Counter(
            "whirlwatch_messages", "Inbound messages handled, by outcome kind.", ["kind"], registry=r
        )
        self.rejected = Counter(
            "whirlwatch_rejected", "Inbound messages rejected, by reason.", ["reason"], registry=r
        )
        self.processing = Histogram(
            "whirlwatch_processing_seconds", "Decode-to-commit time per message, s.",
            buckets=TIME_BUCKETS, registry=r,
        )
        self.in_flight = Gauge(
            "whirlwatch_in_flight", "Messages received and not yet acknowledged.", registry=r
        )
        self.alarms = Gauge("whirlwatch_alarms", "Alarms in the store, by state.", ["state"], registry=r)
        self.transitions = Counter(
            "whirlwatch_alarm_transitions", "Alarm transitions published, by name.", ["transition"],
            registry=r,
        )
        self.batch_size = Histogram(
            "whirlwatch_batch_size", "Messages committed together in one transaction.",
            buckets=(1, 2, 4, 8, 16, 32, 64), registry=r,
        )
        self.db_retries = Counter("whirlwatch_db_retries", "Database transactions retried.", registry=r)
        self.batch_reruns = Counter(
            "whirlwatch_batch_reruns",
            "Batches run again because another process stored one of their readings first.",
            registry=r,
        )
        self.publish_failures = Counter(
            "whirlwatch_publish_failures", "Status or alarm publications that failed.", registry=r
        )
        self.db_errors = Counter(
            "whirlwatch_db_errors", "Transient database errors (each retried), by error class.",
            ["error"], registry=r,
        )
        self.processing_errors = Counter(
            "whirlwatch_processing_errors",
            "Readings set aside as dead letters because processing them failed, by error class.",
            ["error"], registry=r,
        )

        # Notifications (monitor/notify/dispatch.py), by target: webhook, email.
        self.notifications_delivered = Counter(
            "whirlwatch_notifications_delivered", "Alarm transitions delivered, by target.", ["target"],
            registry=r,
        )
        self.notification_failures = Counter(
            "whirlwatch_notification_failures", "Failed delivery attempts (each retry counts), by target.",
            ["target"], registry=r,
        )
        self.notifications_given_up = Counter(
            "whirlwatch_notifications_given_up",
            "Alarm transitions not delivered after the last attempt, by target.", ["target"], registry=r,
        )
        self.notifications_dropped = Counter(
            "whirlwatch_notifications_dropped",
            "Alarm transitions dropped because the target's queue was full, by target.", ["target"],
            registry=r,
        )
        self.notification_queue = Gauge(
            "whirlwatch_notification_queue", "Alarm transitions waiting for delivery, by target.", ["target"],
            registry=r,
        )

    def observe(self, seconds: float) -> None:
        self.processing.observe(seconds)

    def set_alarm_states(self, counts: Mapping[str, int]) -> None:
        for state in ("active", "acknowledged", "cleared", *counts):
            self.alarms.labels(state=state).set(counts.get(state, 0))

    def text(self) -> bytes:
        return generate_latest(self.registry)

    def watch_health(self, health: Callable[[], Mapping[str, Any]]) -> None:
        """Expose the health view (``health()``, read once per scrape) as gauges."""
        self.registry.register(_HealthCollector(health))


class _HealthCollector:
    """Gauges of the health view, computed when scraped (so an idle or stuck worker
    cannot leave them stale)."""

    def __init__(self, health: Callable[[], Mapping[str, Any]]) -> None:
        self.health = health

    def describe(self) -> list[Any]:
        return []  # computed at each scrape; nothing to check at registration

    def collect(self) -> list[GaugeMetricFamily]:
        h = self.health()
        db = h.get("database") or {}
        retries = h.get("retrying") or []
        age = h.get("last_commit_age_s")

        def gauge(name: str, doc: str, value: float | None) -> GaugeMetricFamily:
            g = GaugeMetricFamily(name, doc)
            g.add_metric([], float("nan") if value is None else float(value))
            return g

        return [
            gauge("whirlwatch_healthy", "1 while /healthz answers ok, else 0.", 1 if h.get("ok") else 0),
            gauge("whirlwatch_broker_connected", "1 while connected to the broker (inbound and outbound).",
                  1 if h.get("connected") and h.get("publisher_connected") else 0),
            gauge("whirlwatch_database_up", "1 while the last database probe answered in time, else 0.",
                  1 if db.get("ok") else 0),
            gauge("whirlwatch_backlog", "Messages received and not yet acknowledged.", h.get("backlog", 0)),
            gauge("whirlwatch_waiting_seconds",
                  "Seconds readings have waited without a commit (0 when none wait).", h.get("waiting_s", 0)),
            gauge("whirlwatch_last_commit_age_seconds",
                  "Seconds since readings were last committed (NaN before the first).", age),
            gauge("whirlwatch_db_retry_attempts", "Attempts of the oldest database retry under way (0: none).",
                  max((r["attempts"] for r in retries), default=0)),
            gauge("whirlwatch_db_retry_seconds", "Age of the oldest database retry under way, s (0: none).",
                  max((r["for_s"] for r in retries), default=0)),
        ]


class MetricsServer:
    """``/metrics``, ``/healthz`` and ``/readyz`` on ``host:port`` in a daemon thread.

    ``health()`` must give a dict with ``ok``; ``ready()`` (optional) one with ``ready``;
    either answers 503 when its flag is false."""

    def __init__(self, metrics: ServiceMetrics, health: Callable[[], dict[str, Any]], address: str,
                 ready: Callable[[], dict[str, Any]] | None = None) -> None:
        host, _, port = address.rpartition(":")

        class Handler(BaseHTTPRequestHandler):
            def do_GET(self) -> None:  # noqa: N802 (http.server's name)
                # Problems and labels quote error texts: never with a URL's password.
                if self.path.startswith("/metrics"):
                    body, ctype, code = redact(metrics.text().decode()).encode(), CONTENT_TYPE_LATEST, 200
                elif self.path.startswith("/healthz"):
                    h = health()
                    body = redact(json.dumps(h, default=str)).encode()
                    ctype, code = "application/json", 200 if h.get("ok") else 503
                elif self.path.startswith("/readyz") and ready is not None:
                    h = ready()
                    body = redact(json.dumps(h, default=str)).encode()
                    ctype, code = "application/json", 200 if h.get("ready") else 503
                else:
                    body, ctype, code = b"not found\n", "text/plain", 404
                self.send_response(code)
                self.send_header("Content-Type", ctype)
                self.send_header("Content-Length", str(len(body)))
                self.end_headers()
                self.wfile.write(body)

            def log_message(self, *_a: Any) -> None:
                pass

        self.server = ThreadingHTTPServer((host or "127.0.0.1", int(port)), Handler)
        self.port = self.server.server_address[1]
        self._thread = threading.Thread(target=self.server.serve_forever, name="metrics", daemon=True)

    def start(self) -> None:
        self._thread.start()

    def stop(self) -> None:
        self.server.shutdown()
        self.server.server_close()
