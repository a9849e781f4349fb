"""The service's health and readiness views (docs/service.md, "Health").

``/healthz`` (:meth:`Health.view`): ``ok`` is false, with the reasons in ``problems``,
while the source (the broker connection) is down, the database does not answer its probe,
readings have waited :data:`STALL_S` without a commit, or database work has been retried
that long. ``/readyz`` (:meth:`Health.readiness`): started, subscribed, the database
answered its last probe, and healthy. The database is probed every :data:`PROBE_EVERY_S`
(:meth:`Health.probe_loop`), and every change of health is logged
(:meth:`Health.watch`), so an outage is in the log even when nobody asks.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace
from typing import Any

from monitor.io.mqtt_publisher import Publisher
from monitor.io.source import Source
from monitor.model.timefmt import iso_utc
from monitor.service.failures import Retrier, short_cause
from monitor.store import Store

log = logging.getLogger("whirlwatch.service")

#: Readings waiting this long without a commit, or a database retry loop this old, make
#: the service unhealthy, s.
STALL_S = 15.0
#: The database is asked ``SELECT`` this often, s; a question unanswered this long makes
#: the service unhealthy before the connection's own timeouts end it, s.
PROBE_EVERY_S = 5.0
PROBE_LIMIT_S = 5.0


@dataclass(frozen=True)
class Probe:
    """The database probe's last result (monotonic times, s): ``ok`` None until the first
    answer; ``started_m`` set while a probe waits for its answer."""

    ok: bool | None = None
    error: str | None = None
    at_m: float | None = None
    started_m: float | None = None

    def view(self, now_m: float) -> dict[str, Any]:
        """The database part of the health view: not ok after a failed probe, or while
        one has waited more than :data:`PROBE_LIMIT_S`."""
        pending = now_m - self.started_m if self.started_m is not None else 0.0
        ok = self.ok is not False and pending <= PROBE_LIMIT_S
        error = self.error if self.ok is False else None
        if pending > PROBE_LIMIT_S:
            error = f"no answer for {pending:.0f} s"
        return {
            "ok": ok,
            "error": error,
            "checked_age_s": None if self.at_m is None else round(now_m - self.at_m, 1),
            "probe_waiting_s": round(pending, 1),
        }


class Health:
    """What the health views are built from: the database probe, the last commit of
    readings, the retries under way (``retrier``), and ``stop`` (the service stopping)."""

    def __init__(self, store: Store, retrier: Retrier, stop: threading.Event) -> None:
        self._store = store
        self._retrier = retrier
        self._stop = stop
        self._lock = threading.Lock()
        self._probe = Probe()
        self._last_commit: tuple[float, float] | None = None  # (epoch s, monotonic s)

    def committed(self) -> None:
        """A batch of readings was committed now."""
        with self._lock:
            self._last_commit = (time.time(), time.monotonic())

    def view(self, source: Source[Any] | None, publisher: Publisher | None, *,
             rejected: Mapping[str, int], processing_errors: int, machines: int) -> dict[str, Any]:
        """The health view (``/healthz``): also the backlog (messages received and not yet
        acknowledged), the age of the last commit, the retries under way, and counts."""
        now_m = time.monotonic()
        src, pub = source, publisher
        connected = bool(src and src.connected)
        pub_connected = bool(pub and pub.connected)
        backlog = src.stats.in_flight if src else 0
        waiting_s = src.waiting_s(now_m) if src else 0.0
        retries = self._retrier.under_way(now_m)
        with self._lock:
            last = self._last_commit
            probe = self._probe
        db = probe.view(now_m)
        problems: list[str] = []
        if self._stop.is_set():
            problems.append("the service is stopping")
        if not connected:
            why = src.last_error if src and src.last_error else None
            problems.append("not connected to the broker" + (f" ({why})" if why else ""))
        if pub is not None and not pub_connected:
            problems.append("the publisher is not connected to the broker")
        if not db["ok"]:
            problems.append(f"database: {db['error']}")
        if waiting_s > STALL_S:
            problems.append(f"{backlog} messages have waited {waiting_s:.0f} s without a commit")
        for r in retries:
            if r["for_s"] > STALL_S:
                problems.append(f"database work retried for {r['for_s']:.0f} s ({r['error_class']})")
        return {
            "ok": not problems,
            "problems": problems,
            "connected": connected,
            "publisher_connected": pub_connected,
            "backlog": backlog,
            "in_flight": backlog,
            "waiting_s": round(waiting_s, 1),
            "last_commit_at": None if last is None else
            iso_utc(last[0], timespec="milliseconds"),
            "last_commit_age_s": None if last is None else round(now_m - last[1], 1),
            "retrying": retries,
            "database": db,
            "received": src.stats.received if src else 0,
            "acked": src.stats.acked if src else 0,
            "rejected": dict(rejected),
            "processing_errors": processing_errors,
            "machines": machines,
        }

    def readiness(self, view: Mapping[str, Any], *, started: bool, source: Source[Any] | None) -> dict[str, Any]:
        """The readiness view (``/readyz``) from the health ``view``: started, subscribed,
        the database answered its last probe, and healthy."""
        problems = list(view["problems"])
        if not started:
            problems.insert(0, "starting")
        elif source is not None and not source.wait_subscribed(0):
            problems.append("not subscribed")
        with self._lock:
            probed = self._probe.ok
        if probed is None:
            problems.append("database not probed yet")
        return {"ready": not problems, "problems": problems}

    def probe_database(self) -> bool:
        """Ask the database a one-row question; record the answer for health. Logged
        when the answer changes (bad after good, good again after bad)."""
        with self._lock:
            self._probe = replace(self._probe, started_m=time.monotonic())
        try:
            with self._store.engine.connect() as c:
                c.exec_driver_sql("SELECT 1 FROM machines LIMIT 1").all()
            ok, error = True, None
        except Exception as exc:
            ok, error = False, short_cause(exc)
        with self._lock:
            was = self._probe.ok
            self._probe = Probe(ok=ok, error=error, at_m=time.monotonic(), started_m=None)
        if not ok and was is not False:
            log.warning("database probe failed", extra={"error": error})
        elif ok and was is False:
            log.info("database answers again")
        return ok

    def probe_loop(self) -> None:
        """Probe the database every :data:`PROBE_EVERY_S` until the service stops."""
        while not self._stop.is_set():
            self.probe_database()
            self._stop.wait(PROBE_EVERY_S)

    def watch(self, health: Callable[[], Mapping[str, Any]]) -> None:
        """Log each change of ``health()`` (with its problems), once a second until the
        service stops. Touches neither the database nor the broker."""
        was: list[str] = []
        while not self._stop.wait(1.0):
            problems = list(health()["problems"])
            if problems and not was:
                log.warning("service unhealthy", extra={"problems": problems})
            elif was and not problems:
                log.info("service healthy again")
            was = problems
