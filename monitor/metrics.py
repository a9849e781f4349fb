"""Prometheus metrics of the service and a small health/metrics HTTP endpoint.

Each :class:`ServiceMetrics` has its own ``CollectorRegistry`` so several services in one
process (tests, the demo) do not collide. :class:`MetricsServer` serves ``/metrics``
(Prometheus text format) and ``/healthz`` (JSON: connected, in flight, counts) on
``service.metrics_address``; it is off unless that setting is given.
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

#: Processing-time buckets, s: a 16,384-sample analysis takes a few ms.
TIME_BUCKETS = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 10.0)


class ServiceMetrics:
    """Counters and gauges: messages in (by kind), rejected (by reason), processing time,
    in flight, alarm transitions, alarms by state, database retries, batch reruns, publish
    failures."""

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

    def observe(self, seconds: float) -> None:
        self.processing.observe(seconds)

    def set_alarm_states(self, counts: Mapping[str, int]) -> None:
        for state in ("active", "acknowledged", "cleared", *counts):
            self.alarms.labels(state=state).set(counts.get(state, 0))

    def text(self) -> bytes:
        return generate_latest(self.registry)


class MetricsServer:
    """``/metrics`` and ``/healthz`` on ``host:port`` in a daemon thread."""

    def __init__(self, metrics: ServiceMetrics, health: Callable[[], dict[str, Any]], address: str) -> None:
        host, _, port = address.rpartition(":")
        outer = self

        class Handler(BaseHTTPRequestHandler):
            def do_GET(self) -> None:  # noqa: N802 (http.server's name)
                if self.path.startswith("/metrics"):
                    body, ctype, code = metrics.text(), CONTENT_TYPE_LATEST, 200
                elif self.path.startswith("/healthz"):
                    h = health()
                    body = json.dumps(h, default=str).encode()
                    ctype, code = "application/json", 200 if h.get("ok") else 503
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
        _ = outer

    def start(self) -> None:
        self._thread.start()

    def stop(self) -> None:
        self.server.shutdown()
        self.server.server_close()
