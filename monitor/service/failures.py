"""Failures of database work: transient or deterministic, named in one line, retried.

docs/service.md, "Failures": a *transient* error (:func:`is_transient`: the database
unreachable, timed out, locked or full) is retried with back-off while the service runs
(:class:`Retrier`), nothing is acknowledged meanwhile, and health and metrics say so. Any
other error is *deterministic* (the same input fails the same way again): the caller sets
the reading that fails aside (monitor/service/isolation.py).
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, TypeVar

from sqlalchemy import exc as sa_exc

from monitor.metrics import ServiceMetrics
from monitor.model.timefmt import iso_utc
from monitor.service.logs import LOG_REPEAT_S
from monitor.store.db import redact

log = logging.getLogger("whirlwatch.service")

T = TypeVar("T")

#: Back-off of database retries, s (doubling up to the maximum).
DB_RETRY_MIN_S = 0.2
DB_RETRY_MAX_S = 10.0

#: SQLSTATE classes (PostgreSQL manual, Appendix A "PostgreSQL Error Codes") of errors that
#: do not depend on the data sent: connection (08), transaction rollback such as deadlock
#: or serialization (40), insufficient resources such as disk full (53), object not in
#: prerequisite state such as lock not available (55), operator intervention such as
#: query canceled or server shutdown (57), system errors (58), configuration (F0),
#: invalid authorization (28), invalid catalog name (3D), internal errors such as data
#: corruption (XX) and syntax or access rule violations (42: a missing table or privilege,
#: which no reading causes and a split would wrongly blame on every reading in turn).
TRANSIENT_SQLSTATE_CLASSES = frozenset({"08", "28", "3D", "40", "42", "53", "55", "57", "58", "F0", "XX"})


class ReadingRaced(Exception):
    """A reading appeared in the store between the existence check and the insert (another
    process stored it): the unit of work runs again at once, and its check then sees it."""


def is_transient(exc: BaseException) -> bool:
    """True for an error that says nothing about the data (the database unreachable,
    timed out, locked, out of disk or misconfigured): retry the same work later. False for
    a deterministic one (the same reading fails the same way again): set it aside.

    SQLAlchemy's OperationalError, InterfaceError, DisconnectionError and pool TimeoutError
    (and any error it marks as a disconnect), a bare DatabaseError (SQLite's "database disk
    image is malformed": the file, not the reading), operating-system errors, and database
    errors whose SQLSTATE class is in :data:`TRANSIENT_SQLSTATE_CLASSES` are transient.
    DataError, IntegrityError and everything else are deterministic."""
    if isinstance(exc, sa_exc.DBAPIError):
        if exc.connection_invalidated:
            return True
        state = getattr(exc.orig, "sqlstate", None)
        if isinstance(state, str) and len(state) == 5:
            return state[:2] in TRANSIENT_SQLSTATE_CLASSES
    if isinstance(exc, sa_exc.OperationalError | sa_exc.InterfaceError | sa_exc.DisconnectionError
                  | sa_exc.TimeoutError | OSError | MemoryError):
        return True
    if type(exc) is sa_exc.DatabaseError:
        return True
    # The pool's words when every reconnect of a checkout failed (sqlalchemy.pool.base).
    return isinstance(exc, sa_exc.InvalidRequestError) and str(exc) == "This connection is closed"


def short_cause(exc: BaseException, limit: int = 300) -> str:
    """One line naming an error: its class and first line (the driver's own message for
    a database error, without the SQL and parameters SQLAlchemy appends), passwords
    redacted, at most ``limit`` characters, printable in any log or column."""
    inner = exc.orig if isinstance(exc, sa_exc.DBAPIError) and exc.orig is not None else exc
    first = (str(inner).strip().splitlines() or [""])[0]
    text = f"{type(inner).__name__}: {first}" if first else type(inner).__name__
    return printable(redact(text))[:limit]


def printable(text: str) -> str:
    """``text`` safe for any database text column and log: characters UTF-8 cannot carry
    (lone surrogates) and NUL written as backslash escapes."""
    return text.encode("utf-8", "backslashreplace").decode("utf-8").replace("\x00", "\\x00")


@dataclass
class RetryState:
    """A unit of database work being retried after transient errors."""

    since: float  # epoch s of the first failure
    since_m: float  # the same on the monotonic clock
    attempts: int = 0
    error_class: str = ""
    error: str = ""
    logged_m: float = 0.0

    def to_json(self, now_m: float) -> dict[str, Any]:
        return {
            "attempts": self.attempts, "error_class": self.error_class, "error": self.error,
            "since": iso_utc(self.since),
            "for_s": round(now_m - self.since_m, 1),
        }


class Retrier:
    """Runs units of database work until they commit, one retry state per thread.

    ``stop`` set: the next failure is raised instead of retried (the messages stay
    unacknowledged and come back to the next session)."""

    def __init__(self, stop: threading.Event, metrics: ServiceMetrics) -> None:
        self._stop = stop
        self._metrics = metrics
        self._lock = threading.Lock()
        self._retries: dict[str, RetryState] = {}

    def run(self, work: Callable[[], T], *, on_failure: Callable[[], None]) -> T:
        """``work()`` until it returns, backing off between attempts while its errors are
        transient (:func:`is_transient`); a deterministic error, or any error once the
        service is stopping, is raised to the caller. ``on_failure`` runs after every
        failed attempt (the in-memory state may be ahead of the database's)."""
        delay = DB_RETRY_MIN_S
        while True:
            try:
                out = work()
            except ReadingRaced:
                on_failure()
                self._metrics.batch_reruns.inc()
                continue
            except Exception as exc:
                on_failure()
                if not is_transient(exc) or self._stop.is_set():
                    self._ended(failed=True)
                    raise
                try:
                    self._failed(exc, delay)
                except Exception:  # bookkeeping must never turn a retry into a set-aside
                    log.exception("recording a database retry failed")
                self._stop.wait(delay)
                delay = min(delay * 2, DB_RETRY_MAX_S)
                continue
            self._ended(failed=False)
            return out

    def under_way(self, now_m: float) -> list[dict[str, Any]]:
        """The retries under way, by worker thread, for the health view."""
        with self._lock:
            return [dict(st.to_json(now_m), worker=name) for name, st in sorted(self._retries.items())]

    def _failed(self, exc: BaseException, delay: float) -> None:
        """Record a transient failure of this thread's unit of work for health and
        metrics; log the first, a change of error, and a reminder every LOG_REPEAT_S."""
        name = threading.current_thread().name
        now_m = time.monotonic()
        cause = short_cause(exc)
        with self._lock:
            st = self._retries.get(name)
            if st is None:
                st = self._retries[name] = RetryState(since=time.time(), since_m=now_m)
            st.attempts += 1
            changed = st.error_class != type(exc).__name__
            st.error_class, st.error = type(exc).__name__, cause
            due = changed or now_m - st.logged_m >= LOG_REPEAT_S
            if due:
                st.logged_m = now_m
            attempts, for_s = st.attempts, now_m - st.since_m
        self._metrics.db_retries.inc()
        self._metrics.db_errors.labels(error=type(exc).__name__).inc()
        if due:
            log.warning("database work failed; retrying", extra={
                "error": cause, "error_class": type(exc).__name__, "attempts": attempts,
                "failing_for_s": round(for_s, 1), "retry_in_s": delay, "worker": name})

    def _ended(self, *, failed: bool) -> None:
        name = threading.current_thread().name
        with self._lock:
            st = self._retries.pop(name, None)
        if st is not None and not failed:
            log.info("database work succeeded again", extra={
                "attempts": st.attempts + 1, "failed_for_s": round(time.monotonic() - st.since_m, 1),
                "last_error": st.error, "worker": name})
