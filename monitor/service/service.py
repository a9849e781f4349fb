"""The service loop: MQTT in, analysis and detection, one SQL transaction, ack, MQTT out.

Per batch of messages (those already waiting in the hand-off queue, at most
:data:`MAX_BATCH`; never waiting for more), in this order (docs/service.md):

1. decode and validate each (:func:`monitor.io.ingest.decode_message`); a rejection is
   counted and its dead letter written with the batch;
2. waveforms: analyse (pure, outside any transaction);
3. one transaction: one query finds the readings already stored (a redelivery is never
   fed to the detector twice); one query takes the detector-state versions of the machines
   touched (row locks on PostgreSQL) with their alarms acknowledged in the dashboard,
   reloads an evaluator only when another process moved it on and applies those
   acknowledgements; each new reading is
   evaluated in arrival order; measurements, speed readings and spectra go in as multi-row
   ``INSERT ... ON CONFLICT DO NOTHING``; alarm transitions are recorded in order; each
   machine's detector state is written once;
4. commit, then acknowledge every message of the batch;
5. hand each alarm transition and at most one retained status per machine to the
   publisher's outbound queue (QoS 1, not waiting for the PUBACKs).

A crash at any instant leaves either nothing or everything of a batch committed, and its
messages unacknowledged until it is: the broker redelivers, the existence check skips the
replay.

Failures (docs/service.md, "Failures"): a *transient* error (:func:`is_transient`: the
database unreachable, timed out, locked or full) is retried with back-off while the
service runs, nothing is acknowledged meanwhile, and health and metrics say so; the
messages are left unacknowledged when it stops. Any other error is *deterministic* (the
same input fails the same way again): the batch is split in halves until the reading
that fails is alone, the others are committed, and that one is set aside as a dead letter
(reason ``processing_error``); a stream whose readings keep failing raises a
``processing_fault`` alarm (docs/alarms.md), cleared by its next reading processed.

Exceptions::

    RuntimeError
     +-- ServiceError     the service cannot start (no schema, empty registry, ...)
"""

from __future__ import annotations

import datetime as dt
import gc
import json
import logging
import math
import sys
import threading
import time
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import and_, bindparam, event, func, select
from sqlalchemy import exc as sa_exc

from monitor.analysis.waveform import ReadingAnalysis, analyse_waveform
from monitor.detection.alarms import AlarmKey, Transition, severity_rank
from monitor.detection.evaluator import (
    MachineEvaluator,
    ReadingEvaluation,
    evaluator_from_state,
    retire_state,
    stored_state,
)
from monitor.io.ingest import SPEED_STREAM, decode_message
from monitor.io.ingest_limits import IngestLimits, Rejected
from monitor.io.mqtt_publisher import Publisher
from monitor.io.mqtt_settings import MqttError, MqttSettings
from monitor.io.mqtt_source import InboundMessage, MessageSource
from monitor.io.rejection_count import RejectionCounter
from monitor.metrics import MetricsServer, ServiceMetrics
from monitor.model.jsonsafe import jsonable
from monitor.model.readings import SpeedReading, Waveform
from monitor.model.registry import Registry
from monitor.model.timefmt import iso_utc
from monitor.service.registry_follow import follow, start_registry
from monitor.settings import Settings
from monitor.store import (
    Store,
    add_dead_letter,
    apply_retention,
    record_transitions,
)
from monitor.store.db import redact
from monitor.store.models import (
    Alarm,
    DetectorState,
    Measurement,
    SpectrumSnapshot,
    SpeedReadingRow,
    utcnow,
)
from monitor.store.models import Machine as MachineRow
from monitor.store.queries import alarm_as_json, alarm_counts_by_state
from monitor.store.writes import (
    CLOSED_STATES,
    existing_measurements,
    existing_speed_readings,
    insert_ignore,
    insert_many_ignore,
    measurement_values,
    save_detector_states,
    snapshot_rows,
    snapshot_times,
    to_datetime,
)

log = logging.getLogger("whirlwatch.service")

#: Back-off of database retries, s (doubling up to the maximum).
DB_RETRY_MIN_S = 0.2
DB_RETRY_MAX_S = 10.0

#: Most messages taken from the hand-off queue into one transaction (group commit).
MAX_BATCH = 32

#: Health (docs/service.md, "Health"): readings waiting this long without a commit, or a
#: database retry loop this old, make the service unhealthy, s.
STALL_S = 15.0
#: The database is asked ``SELECT`` this often, s; a question unanswered this long makes
#: the service unhealthy before the connection's own timeouts end it, s.
PROBE_EVERY_S = 5.0
PROBE_LIMIT_S = 5.0
#: A PostgreSQL statement, commit or ping without an answer this long has its connection
#: closed (store/db.py SilenceWatchdog), s; retention's deletes may take longer.
SILENCE_LIMIT_S = 15.0
RETENTION_SILENCE_LIMIT_S = 900.0
#: Acknowledgements made in the dashboard are looked for this often, s.
ACK_SYNC_S = 1.0
#: A failure that keeps repeating is logged again at most this often, s.
LOG_REPEAT_S = 30.0

#: Alarm kind of a stream whose readings keep failing to be processed (docs/alarms.md).
PROCESSING_FAULT = "processing_fault"


class ServiceError(RuntimeError):
    """The service cannot start; the message says why in one sentence."""


# ----------------------------------------------------------------------------- logging


class JsonLineFormatter(logging.Formatter):
    """One JSON object per log line: ts, level, logger, msg and any ``extra`` fields."""

    _skip = frozenset(logging.LogRecord("", 0, "", 0, "", (), None).__dict__) | {"message"}

    def format(self, record: logging.LogRecord) -> str:
        out: dict[str, Any] = {
            "ts": iso_utc(record.created, timespec="milliseconds"),
            "level": record.levelname.lower(),
            "logger": record.name,
            "msg": record.getMessage(),
        }
        for k, v in record.__dict__.items():
            if k not in self._skip and not k.startswith("_"):
                out[k] = v
        if record.exc_info:
            out["error"] = self.formatException(record.exc_info)
        return json.dumps(out, default=str)


def configure_logging(level: str = "INFO", stream: Any = None) -> None:
    """Send the service's logs to ``stream`` (stderr) as JSON lines at ``level``.

    Python warnings (numpy's RuntimeWarnings on overflow, invalid values, ...) and
    exceptions that end a thread or the program go through the same logger, so the
    stream holds nothing but JSON lines."""
    handler = logging.StreamHandler(stream or sys.stderr)
    handler.setFormatter(JsonLineFormatter())
    root = logging.getLogger()
    root.handlers[:] = [handler]
    root.setLevel(level.upper())
    warnings.showwarning = _log_warning
    sys.excepthook = _log_uncaught
    threading.excepthook = _log_thread_exception


def _log_warning(message: Warning | str, category: type[Warning], filename: str, lineno: int,
                 file: Any = None, line: str | None = None) -> None:
    """``warnings.showwarning`` replaced: one JSON log record per warning shown."""
    logging.getLogger("py.warnings").warning(str(message), extra={
        "category": category.__name__, "where": f"{filename}:{lineno}"})


def _log_uncaught(exc_type: type[BaseException], exc: BaseException, tb: Any) -> None:
    logging.getLogger("whirlwatch").critical("uncaught exception", exc_info=(exc_type, exc, tb))


def _log_thread_exception(args: threading.ExceptHookArgs) -> None:
    if args.exc_type is SystemExit:
        return
    logging.getLogger("whirlwatch").error(
        "thread ended by an exception", extra={"thread_name": args.thread.name if args.thread else None},
        exc_info=(args.exc_type, args.exc_value, args.exc_traceback))  # type: ignore[arg-type]


# ----------------------------------------------------------------------------- failures

#: SQLSTATE classes (PostgreSQL manual, Appendix A "PostgreSQL Error Codes") of errors that
#: do not depend on the data sent: connection (08), transaction rollback such as deadlock
#: or serialization (40), insufficient resources such as disk full (53), object not in
#: prerequisite state such as lock not available (55), operator intervention such as
#: query canceled or server shutdown (57), system errors (58), configuration (F0),
#: invalid authorization (28), invalid catalog name (3D), internal errors such as data
#: corruption (XX) and syntax or access rule violations (42: a missing table or privilege,
#: which no reading causes and a split would wrongly blame on every reading in turn).
TRANSIENT_SQLSTATE_CLASSES = frozenset({"08", "28", "3D", "40", "42", "53", "55", "57", "58", "F0", "XX"})


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


# ----------------------------------------------------------------------------- outcome


@dataclass
class Outcome:
    """What became of one message (returned by :meth:`Service.handle` for tests/benches)."""

    #: "waveform", "speed", "rejected", "duplicate", "processing_error"; for changes made
    #: outside the readings "acknowledged", "stale", "registry" (alarms closed by a
    #: registry edit) and "retired" (a retired machine: its retained status is removed).
    kind: str
    machine: str | None = None
    reason: str | None = None
    events: list[dict[str, Any]] = field(default_factory=list)
    status: dict[str, Any] | None = None


@dataclass
class _Item:
    """One message on its way through a batch."""

    topic: str
    payload: bytes
    reading: Waveform | SpeedReading | None = None
    rejection: Rejected | None = None
    analysis: ReadingAnalysis | None = None
    evaluation: ReadingEvaluation | None = None
    check: bool = True  # look it up in the store before evaluating it
    transitions: list[Transition] = field(default_factory=list)
    outcome: Outcome | None = None


class _Raced(Exception):
    """A reading appeared in the store between the existence check and the insert."""


def _no_autocheckpoint(dbapi_connection: Any, _record: Any) -> None:
    cur = dbapi_connection.cursor()
    cur.execute("PRAGMA wal_autocheckpoint=0")
    cur.close()


def _wkey(w: Any) -> tuple[str, str, dt.datetime]:
    return (w.machine, w.point, to_datetime(w.ts))


def _skey(r: Any) -> tuple[str, dt.datetime]:
    return (r.machine, to_datetime(r.ts))


def _evaluation_json(evaluation: ReadingEvaluation, *, margins: bool = True) -> Any:
    # The detector's own JSON form (zone limits as ``zone_limits_mm_s``; the dashboard
    # reads both forms). The store's JSON serialiser turns NaN into null (store/db.py).
    return evaluation.to_json(margins=margins)


@dataclass
class _MachineView:
    """Latest facts of one machine for its retained status."""

    ts: float | None = None
    speed_hz: float | None = None
    speed_source: str | None = None
    zones: dict[str, str | None] = field(default_factory=dict)
    nearest: dict[str, Any] | None = None
    #: Evaluations since the status was last built, oldest first: the nearest margin is
    #: taken from the newest that has one when the status is built (once per batch),
    #: not computed for every reading.
    unseen: list[Any] = field(default_factory=list)

    def nearest_margin(self) -> dict[str, Any] | None:
        for evaluation in reversed(self.unseen):
            m = evaluation.nearest_margin()
            if m is not None:
                self.nearest = {"subject": m.subject, "margin_pct": m.margin_pct,
                                "required_pct": m.required_pct, "status": m.status}
                break
        self.unseen.clear()
        return self.nearest


# ----------------------------------------------------------------------------- service


class Service:
    """The whirlwatch service: one :class:`MessageSource`, one :class:`Publisher`, one store.

    Parameters
    ----------
    settings : Settings
        From :func:`monitor.config.load_settings`.
    limits : IngestLimits, optional
        Plausibility bounds of inbound messages.
    clock : callable, optional
        Epoch seconds for the stale-stream check and the ingest age checks (``time.time``).
        The demo passes the replayed plant's own clock.
    client_id : str, optional
        MQTT client id (overrides the settings).
    stale_check_s : float
        How often silent streams are looked for, s (0 turns the check off).
    """

    def __init__(
        self,
        settings: Settings,
        *,
        limits: IngestLimits | None = None,
        clock: Callable[[], float] | None = None,
        client_id: str | None = None,
        stale_check_s: float = 30.0,
        max_batch: int = MAX_BATCH,
    ) -> None:
        self.settings = settings
        self.limits = limits or IngestLimits()
        self.clock = clock or time.time
        self.stale_check_s = stale_check_s
        if isinstance(max_batch, bool) or not isinstance(max_batch, int) or max_batch < 1:
            raise ValueError(f"max_batch must be a whole number of messages >= 1, got {max_batch!r}.")
        self.max_batch = max_batch
        self.mqtt = MqttSettings.from_settings(settings.broker, client_id=client_id)
        self.prefix = settings.broker.topic_prefix
        self.rejections = RejectionCounter(60.0)
        self.metrics = ServiceMetrics()
        self.store = Store.open(settings.database.url, busy_timeout_ms=settings.database.busy_timeout_ms,
                                silence_limit_s=SILENCE_LIMIT_S)
        self._pg = self.store.engine.dialect.name == "postgresql"
        self._sqlite = self.store.engine.dialect.name == "sqlite"
        if self._sqlite:
            # A WAL checkpoint copies and syncs the log into the database: 100-200 ms that
            # would otherwise land on whichever commit crosses the 1000-page mark, i.e. on
            # the worker. The periodic thread runs it instead (PASSIVE: it never blocks
            # the writer).
            event.listen(self.store.engine, "connect", _no_autocheckpoint)
            self.store.engine.dispose()
        self.registry = self._load_registry()
        self._evaluators: dict[str, MachineEvaluator] = {}
        self._versions: dict[str, int | None] = {}
        self._views: dict[str, _MachineView] = {m.id: _MachineView() for m in self.registry.machines}
        # Registry changes still to settle (monitor/service/registry_follow.py): machines whose entry
        # changed (alarms of what it no longer holds to close), retired machines.
        self._unsettled: set[str] = set()
        self._unretired: set[str] = set()
        self._last_ts: dict[tuple[str, str], float] = {}
        # Hot-path statements, built once (building costs about what running them does).
        self._versions_stmt: Any = None
        # Spectrum snapshots this process committed, per (machine, point): a reading with
        # one of them inside its cadence window is not due, without asking the database.
        self._kept: dict[tuple[str, str], list[dt.datetime]] = {}
        self._acks_stmt: Any = None
        self._lock = threading.RLock()
        self._stop = threading.Event()
        self._periodic: threading.Thread | None = None
        self._prober: threading.Thread | None = None
        self._watcher: threading.Thread | None = None
        # Health (docs/service.md): database retries under way (by thread), the last
        # commit of readings, the database probe.
        self._health_lock = threading.Lock()
        self._retries: dict[str, RetryState] = {}
        self._last_commit: tuple[float, float] | None = None  # (epoch s, monotonic s)
        self._probe: dict[str, Any] = {"ok": None, "error": None, "at_m": None, "started_m": None}
        self._started = False
        self._set_aside_count = 0
        self._job_errors: dict[str, float] = {}  # periodic job -> monotonic time last logged
        self.source: MessageSource | None = None
        self.publisher: Publisher | None = None
        self.metrics_server: MetricsServer | None = None
        self._load_state()

    # -- start-up

    def _load_registry(self) -> Registry:
        # The file adds and updates, never deletes (monitor/service/registry_follow.py).
        try:
            registry, self._registry_follower = start_registry(self.store, self.settings.service.machines_file)
        except ValueError as exc:
            raise ServiceError(str(exc)) from exc
        if not registry.machines:
            raise ServiceError(
                "the database holds no machines; import a registry with `whirlwatch machines "
                "import FILE` or pass --machines FILE."
            )
        return registry

    def _load_state(self) -> None:
        with self.store.session() as s:
            rows = s.execute(
                select(Measurement.machine_id, Measurement.point_id, func.max(Measurement.ts)).group_by(
                    Measurement.machine_id, Measurement.point_id
                )
            ).all()
            # Registry changes made while the service was stopped: machines with open
            # alarms (some may be of a mode or point since taken out; their states are
            # checked at the first registry pass), and retired machines whose alarms and
            # status nobody has closed yet.
            with_open = s.scalars(select(Alarm.machine_id).where(Alarm.state.not_in(CLOSED_STATES))
                                  .distinct()).all()
            retired = s.execute(
                select(DetectorState.machine_id, DetectorState.state["retired"].as_boolean())
                .join(MachineRow, MachineRow.id == DetectorState.machine_id)
                .where(MachineRow.active.is_(False))).all()
        for m, p, ts in rows:
            if ts is not None:
                self._last_ts[(m, p)] = ts.timestamp()
        for m in self.registry.machines:
            self._evaluators[m.id] = MachineEvaluator(m)
            self._versions[m.id] = None  # loaded from the database on first use
        known = self.registry.by_id()
        self._unsettled = {m for m in with_open if m in known}
        self._unretired = {m for m, done in retired if not done and m not in known}

    # -- detector state

    def _take_states(self, s: Any, machines: list[str], *, acks: bool = True
                     ) -> tuple[dict[str, MachineEvaluator], dict[str, list[Transition]]]:
        """Lock (PostgreSQL, in machine order so two processes cannot deadlock) and check
        the stored state versions of ``machines``, reloading an evaluator only when another
        process moved its state on; close and record the alarms of what the registry no
        longer holds (:meth:`_close_orphans`); and apply the acknowledgements made in the
        dashboard (stored there already), unless ``acks`` is false. Returns the evaluators
        and, per machine, those transitions made outside the readings, closings first,
        for publishing; the caller writes the states of machines that have some.

        One query: the state rows joined to the machines' acknowledged alarms (the alarms
        still open and acknowledged: a few at most; only the detector-state rows are locked)."""
        if not machines:
            return {}, {}
        if self._versions_stmt is None:
            d, a = DetectorState.__table__, Alarm.__table__
            stmt = (
                select(d.c.machine_id, d.c.state["version"].as_integer(), a.c.ref,
                       a.c.acknowledged_by, a.c.acknowledged_at, a.c.ack_comment)
                .select_from(d.outerjoin(a, and_(a.c.machine_id == d.c.machine_id,
                                                 a.c.state == "acknowledged")))
                .where(d.c.machine_id.in_(bindparam("machines", expanding=True)))
                .order_by(d.c.machine_id, a.c.id)
            )
            self._versions_stmt = stmt.with_for_update(of=d) if self._pg else stmt
        rows = s.connection().execute(self._versions_stmt, {"machines": machines}).all()
        stored = {m: int(v or 0) for m, v, *_ in rows}
        for machine in machines:
            v = stored.get(machine, 0)
            if self._versions.get(machine) != v:
                self._reload(s, machine, v)
        evaluators = {m: self._evaluators[m] for m in machines}
        out = self._close_orphans(s, evaluators)
        self._registry_follower.apply_baseline_restarts(s, evaluators, self._versions, self.clock())
        active = {
            (m, a.id): ev for m, ev in evaluators.items() for a in ev.engine.active() if a.state == "active"
        }
        if not (acks and active):
            return evaluators, out
        if any(m not in stored for m, _ in active):
            # Open alarms but no stored state row (removed by hand): the join cannot see
            # their acknowledgements, so ask the alarms alone.
            for m, trans in self._sync_acks(s, evaluators).items():
                out.setdefault(m, []).extend(trans)
            return evaluators, out
        for machine, _v, ref, user, at, comment in rows:
            ev = active.pop((machine, ref), None) if ref is not None else None
            if ev is None:
                continue
            when = at.timestamp() if at is not None else self.clock()
            out.setdefault(machine, []).append(ev.acknowledge(ref, user or "unknown", comment or "", when))
        return evaluators, out

    def _close_orphans(self, s: Any, evaluators: dict[str, MachineEvaluator]) -> dict[str, list[Transition]]:
        """Alarms of modes, points and excitations taken out of the registry since the
        evaluators' state was written, closed now
        (:meth:`MachineEvaluator.close_orphaned_alarms`) and recorded in this transaction,
        per machine. Only an evaluator restored since its last check has any to close."""
        out: dict[str, list[Transition]] = {}
        now: float | None = None
        for machine, ev in evaluators.items():
            if now is None:
                now = self.clock()
            trans = ev.close_orphaned_alarms(now)
            if trans:
                record_transitions(s, trans)
                out[machine] = trans
                log.info("alarms closed: no longer in the registry", extra={
                    "machine": machine, "alarms": [t.alarm_id for t in trans]})
        return out

    def _follow_registry(self) -> None:
        """Registry edits made since the last batch, live (monitor/service/registry_follow.py). A
        machine whose entry changed is queued for :meth:`apply_registry_requests` to close
        the alarms of what the entry no longer holds (the next batch touching it closes
        them first, if it comes sooner); a retired one is queued to be retired."""
        with self._lock:  # the worker and the periodic thread both follow
            change = self._registry_follower.poll()
            if change is None:
                return
            before = self.registry.by_id()
            self.registry, self._evaluators = follow(self.registry, self._evaluators, change)
            after = self.registry.by_id()
            for mid in change.machines:
                machine = after.get(mid)
                if machine is None:
                    if mid in before:
                        self._unretired.add(mid)
                        self._views.pop(mid, None)
                        self._versions.pop(mid, None)
                    continue
                if before.get(mid) != machine:
                    self._unsettled.add(mid)
                    view = self._views.get(mid)
                    if view is not None:  # a retired point's zone leaves the status
                        kept = {p.id for p in machine.points}
                        view.zones = {p: z for p, z in view.zones.items() if p in kept}
            for m in self.registry.machines:
                self._views.setdefault(m.id, _MachineView())
                if m.id not in self._evaluators:
                    self._versions[m.id] = None  # loaded from the store on first use

    def apply_registry_requests(self) -> list[dict[str, Any]]:
        """Registry edits, live (the periodic loop runs this every 0.5 s): alarms of modes,
        points and excitations taken out of a machine's entry are closed, recorded and
        published; a retired machine's alarms likewise, and its retained status removed
        (:meth:`_retire_machine`); baseline restarts of machines no batch has touched
        since they were asked for are applied. Also what changed while the service was
        stopped, at its first run. Returns the alarm events published."""
        self._follow_registry()
        known = self.registry.by_id()
        with self._lock:
            self._unsettled.intersection_update(known)
            settle = sorted(self._unsettled)
            retire = sorted(self._unretired - set(known))
        machines = sorted({*settle, *(m for m in self._registry_follower.pending_machines() if m in known)})
        outs: list[Outcome] = []
        if machines:
            def work() -> list[Outcome]:
                with self._lock, self.store.write_transaction() as s:
                    evaluators, closed = self._take_states(s, machines, acks=False)
                    if not closed:
                        return []
                    # Written with the closings, keeping each row's reading time.
                    kept = dict(s.execute(select(DetectorState.machine_id, DetectorState.ts)
                                          .where(DetectorState.machine_id.in_(sorted(closed)))).all())
                    self._save_states(s, {m: kept.get(m) for m in closed})
                    done = [Outcome("registry", machine=m, events=self._events(s, [], [], trans),
                                    status=self._status(m, evaluators[m])) for m, trans in closed.items()]
                self._saved(closed)
                return done

            outs += self._retry(work, machines)
            with self._lock:
                self._unsettled.difference_update(settle)
        for mid in retire:
            try:
                out = self._retry(lambda m=mid: self._retire_machine(m), [mid])
            except Exception as exc:
                if is_transient(exc) or self._stop.is_set():
                    raise
                out = None  # the state cannot be read: said once, not retried for ever
                log.error("could not close the alarms of a retired machine", extra={
                    "machine": mid, "error": short_cause(exc)})
            with self._lock:
                self._unretired.discard(mid)
            if out is not None:
                outs.append(out)
        self._announce(outs)
        return [e for o in outs for e in o.events]

    def _retire_machine(self, machine: str) -> Outcome | None:
        """Close the alarms of a machine retired from the registry
        (:func:`monitor.detection.evaluator.retire_state`), record them and write its state marked
        retired, in one transaction; the outcome carries their events and removes the
        machine's retained status when published. None when there is nothing to do: the
        machine is active again, was never monitored (no state), or another process (or an
        earlier run) retired it already."""
        with self._lock, self.store.write_transaction() as s:
            stmt = (select(DetectorState.state, DetectorState.ts)
                    .join(MachineRow, MachineRow.id == DetectorState.machine_id)
                    .where(DetectorState.machine_id == machine, MachineRow.active.is_(False)))
            if self._pg:
                stmt = stmt.with_for_update(of=DetectorState)
            row = s.execute(stmt).one_or_none()
            if row is None or (isinstance(row.state, dict) and row.state.get("retired")):
                return None
            state, trans = retire_state(row.state, self.clock())
            ids = record_transitions(s, trans) if trans else []
            save_detector_states(s, {machine: (state, row.ts)})
            out = Outcome("retired", machine=machine, events=self._events(s, trans, ids, []))
        log.info("machine retired: alarms closed, status removed", extra={
            "machine": machine, "alarms": [t.alarm_id for t in trans]})
        return out

    def _reload(self, s: Any, machine: str, version: int) -> None:
        state = s.execute(
            select(DetectorState.state).where(DetectorState.machine_id == machine)
        ).scalar_one_or_none()
        self._evaluators[machine] = evaluator_from_state(self.registry.machine(machine), state)[0]
        self._versions[machine] = version

    def _sync_acks(self, s: Any, evaluators: dict[str, MachineEvaluator]) -> dict[str, list[Transition]]:
        """Acknowledgements made in the dashboard, applied to the detectors (and returned
        per machine for publishing; the dashboard has stored them already). One query."""
        active = {
            (m, a.id): ev for m, ev in evaluators.items() for a in ev.engine.active() if a.state == "active"
        }
        if not active:
            return {}
        rows = s.execute(self._acks_statement(), {
            "machines": sorted({m for m, _ in active}), "refs": sorted({r for _, r in active})}).all()
        out: dict[str, list[Transition]] = {}
        for machine, ref, user, at, comment in rows:
            ev = active.pop((machine, ref), None)
            if ev is None:
                continue
            when = at.timestamp() if at is not None else self.clock()
            out.setdefault(machine, []).append(ev.acknowledge(ref, user or "unknown", comment or "", when))
        return out

    def _acks_statement(self) -> Any:
        """Acknowledged alarms among given machines and alarm refs (``machines``,
        ``refs``): machine, ref, user, time, comment. Built once."""
        if self._acks_stmt is None:
            t = Alarm.__table__.c
            self._acks_stmt = (
                select(t.machine_id, t.ref, t.acknowledged_by, t.acknowledged_at, t.ack_comment)
                .where(
                    t.machine_id.in_(bindparam("machines", expanding=True)),
                    t.state == "acknowledged",
                    t.ref.in_(bindparam("refs", expanding=True)),
                )
                .order_by(t.id)
            )
        return self._acks_stmt

    def _save_states(self, s: Any, touched: dict[str, float]) -> None:
        """The new state of every machine the batch touched (``{machine: latest ts}``),
        one row each; the version moves on by one per batch."""
        save_detector_states(s, {
            m: (stored_state(self._evaluators[m], (self._versions.get(m) or 0) + 1), ts)
            for m, ts in touched.items()
        })

    def _saved(self, touched: Any, kept: dict[tuple[str, str], list[dt.datetime]] | None = None) -> None:
        """After the commit: the cached versions match what was written, and the snapshots
        the batch kept (or saw) are remembered for the cadence."""
        for m in touched:
            self._versions[m] = (self._versions.get(m) or 0) + 1
        cadence = self.settings.spectra.snapshot_interval_s
        for p, times in (kept or {}).items():
            if times:
                # Only the latest window matters for readings arriving in order.
                latest = max(times)
                self._kept[p] = sorted(t for t in {*self._kept.get(p, ()), *times}
                                       if t > latest - dt.timedelta(seconds=2 * cadence))

    def _forget(self, machines: Any) -> None:
        """After a failed transaction the in-memory evaluators may be ahead of the database."""
        for m in machines:
            self._versions[m] = None

    # -- messages

    def _last(self, machine: str, point: str) -> float | None:
        return self._last_ts.get((machine, point))

    def handle(self, topic: str, payload: bytes) -> Outcome:
        """Process one message up to the commit (no MQTT); see the module docstring."""
        return self.handle_batch([(topic, payload)])[0]

    def handle_batch(
        self, messages: list[tuple[str, bytes]], redelivered: list[bool] | None = None
    ) -> list[Outcome]:
        """Process messages up to one commit for all of them (no MQTT), in order.

        Decode and analyse each, then one transaction: one query finds the redeliveries,
        the detector states of the machines touched are taken once, every new reading is
        evaluated in arrival order, the rows go in with multi-row inserts and each
        machine's detector state is written once. Returns one :class:`Outcome` per
        message; a machine's status rides on the last of its outcomes that has one.
        """
        t0 = time.perf_counter()
        self._follow_registry()
        now = self.clock()
        pending: dict[tuple[str, str], float] = {}

        def last(machine: str, point: str) -> float | None:
            a, b = self._last_ts.get((machine, point)), pending.get((machine, point))
            return b if a is None else a if b is None else max(a, b)

        items: list[_Item] = []
        flags = redelivered if redelivered is not None else [False] * len(messages)
        if len(flags) != len(messages):
            raise ValueError(
                f"redelivered has {len(flags)} flags for {len(messages)} messages; give one each."
            )
        for (topic, payload), dup in zip(messages, flags, strict=True):
            item = _Item(topic, payload)
            try:
                # A broker redelivery (DUP set) of a message whose commit never happened may
                # lie far behind its stream when another process or a later batch moved on:
                # the replay check would drop it, so redeliveries go to the idempotent insert.
                item.reading = decode_message(
                    topic, payload, self.registry, prefix=self.prefix, now=now,
                    last_ts=None if dup else last, limits=self.limits,
                )
            except Rejected as rej:
                item.rejection = rej
                self._count_rejection(topic, rej)
            else:
                r = item.reading
                key = (r.machine, r.point if isinstance(r, Waveform) else SPEED_STREAM)
                pending[key] = max(r.ts, pending.get(key, r.ts))
                if isinstance(r, Waveform):
                    item.analysis = self._analyse(r)
                # Only a reading not newer than its stream's last commit here can already
                # be stored by this process: a redelivery, a repeat, an out-of-order copy.
                # A newer one stored by another process makes the insert come back short
                # and the batch run again with the check.
                stored = self._last_ts.get(key)
                item.check = dup or (stored is not None and r.ts <= stored)
            items.append(item)

        self._commit_isolating(items)
        for it in items:
            r, out = it.reading, it.outcome
            assert out is not None
            if r is not None and out.kind in ("waveform", "speed"):
                key = (r.machine, r.point if isinstance(r, Waveform) else SPEED_STREAM)
                self._last_ts[key] = max(r.ts, self._last_ts.get(key, 0.0))
            self.metrics.messages_in.labels(kind=out.kind).inc()
        share = (time.perf_counter() - t0) / max(1, len(items))
        for _ in items:
            self.metrics.observe(share)
        self.metrics.batch_size.observe(len(items))
        return [it.outcome for it in items if it.outcome is not None]

    def _count_rejection(self, topic: str, rej: Rejected) -> None:
        self.metrics.rejected.labels(reason=rej.reason).inc()
        if self.rejections.record(rej.reason, time.monotonic()):
            log.warning(
                "message rejected",
                extra={"reason": rej.reason, "detail": rej.detail, "topic": topic[:200],
                       "suppressed_since_last": self.rejections.take_suppressed(rej.reason)},
            )

    def _analyse(self, w: Waveform) -> ReadingAnalysis | None:
        machine = self.registry.machine(w.machine)
        try:
            return analyse_waveform(w, machine, machine.point(w.point))
        except Exception as exc:
            # A waveform the analysis cannot use (a dead sensor's flat zeros, too short for
            # the speed range, ...): health checks still run on it and sensor-fault alarms
            # follow; one bad block must not stall the stream behind it.
            log.warning("analysis failed", extra={
                "machine": w.machine, "point": w.point, "error": f"{type(exc).__name__}: {exc}"[:200]})
            return None

    def _commit_isolating(self, items: list[_Item], *, check_all: bool = False) -> None:
        """Commit ``items`` in one transaction (:meth:`_commit`, retried while the errors
        are transient); when it fails deterministically, split it in halves and commit
        each the same way, so the reading that fails is found alone (at most
        2 log2(batch) extra transactions) and set aside (:meth:`_set_aside`), while every
        other reading is committed in arrival order."""
        machines = sorted({it.reading.machine for it in items if it.reading is not None})
        attempts = [0]

        def work() -> None:
            # A run after a failed one (a reading raced in, a database error) checks
            # every reading of the batch against the store.
            attempts[0] += 1
            views = self._copy_views(machines)
            try:
                self._commit(items, check_all=check_all or attempts[0] > 1)
            except BaseException:
                self._views.update(views)  # what a failed run saw was never committed
                raise

        try:
            self._retry(work, machines)
            return
        except Exception as exc:
            if is_transient(exc) or self._stop.is_set():
                raise  # left unacknowledged: redelivered to the next session
            failure = exc
        if len(items) == 1:
            self._set_aside(items[0], failure)
            return
        log.debug("batch failed; splitting it", extra={"messages": len(items), "error": short_cause(failure)})
        half = (len(items) + 1) // 2
        self._commit_isolating(items[:half], check_all=True)
        self._commit_isolating(items[half:], check_all=True)

    def _set_aside(self, it: _Item, failure: BaseException) -> None:
        """Keep a message whose processing fails deterministically as a dead letter
        (reason ``processing_error``, the short cause as detail), count it, log it once,
        and feed its stream's ``processing_fault`` alarm (:meth:`_processing_failed`)."""
        cause = short_cause(failure)
        r = it.reading
        machines = [r.machine] if r is not None else []

        def letter(s: Any) -> int:
            return add_dead_letter(s, topic=printable(it.topic), reason="processing_error",
                                   detail=cause, payload=it.payload)

        def with_alarm() -> Outcome:
            assert r is not None
            with self._lock, self.store.write_transaction() as s:
                letter_id = letter(s)
                evs, outside = self._take_states(s, machines, acks=False)
                ev, closed = evs[r.machine], outside.get(r.machine, [])
                trans = self._processing_failed(ev, r, cause, letter_id)
                ids = record_transitions(s, trans) if trans else []
                self._save_states(s, {r.machine: r.ts})
                out = Outcome("processing_error", machine=r.machine, reason="processing_error",
                              events=self._events(s, trans, ids, closed) if trans or closed else [],
                              status=self._status(r.machine, ev) if trans or closed else None)
            self._saved(machines)
            return out

        def letter_only() -> Outcome:
            with self._lock, self.store.write_transaction() as s:
                letter(s)
            return Outcome("processing_error", machine=r.machine if r else None, reason="processing_error")

        steps = ([with_alarm] if r is not None else []) + [letter_only]
        out: Outcome | None = None
        for step in steps:
            try:
                out = self._retry(step, machines)
                break
            except Exception as exc:
                if is_transient(exc) or self._stop.is_set():
                    raise
                log.error("could not record a processing error in full", extra={
                    "topic": printable(it.topic)[:200], "cause": cause, "error": short_cause(exc)})
        if out is None:
            # Not even its dead letter could be stored: acknowledged without a trace in
            # the store, so it cannot stop the stream; this log line is its record.
            out = Outcome("processing_error", machine=r.machine if r else None, reason="processing_error")
        it.outcome = out
        self._set_aside_count += 1
        self.metrics.processing_errors.labels(error=cause.split(":", 1)[0]).inc()
        log.error("reading set aside", extra={
            "topic": printable(it.topic)[:200], "machine": r.machine if r else None,
            "point": getattr(r, "point", None), "reading_ts": r.ts if r else None, "cause": cause})

    # -- processing_fault alarms

    @staticmethod
    def _fault_key(machine: str, reading: Waveform | SpeedReading) -> AlarmKey:
        """The ``processing_fault`` alarm key of a reading's stream: its point's waveforms,
        or its machine's speed messages (docs/alarms.md)."""
        if isinstance(reading, Waveform):
            return AlarmKey(machine, reading.point, PROCESSING_FAULT, "waveform")
        return AlarmKey(machine, None, PROCESSING_FAULT, "speed")

    def _processing_failed(self, ev: MachineEvaluator, r: Waveform | SpeedReading, cause: str,
                           letter_id: int) -> list[Transition]:
        """One more reading of ``r``'s stream that could not be processed: raised (alert)
        after the machine's persistence count of such readings in a row."""
        key = self._fault_key(r.machine, r)
        evidence = {
            "cause": cause, "failures": ev.engine.persistence, "dead_letter_id": letter_id,
            "reading_ts": iso_utc(r.ts),
            "message": "readings of this stream cannot be processed and are kept as dead letters; "
                       "the machine is not watched here until they can",
        }
        rid = printable(r.reading_id) if isinstance(r, Waveform) and r.reading_id else None
        return ev.engine.update(key, r.ts, "alert", "alert", evidence, rid)

    def _processing_resumed(self, evaluators: dict[str, MachineEvaluator], fresh: list[_Item]) -> None:
        """A stream with a ``processing_fault`` alarm (or failures counted towards one)
        whose reading was processed in this batch: the alarm clears at once (or the count
        restarts); the transition rides on that stream's last reading of the batch."""
        for ev in evaluators.values():
            keys = [k for k in ev.engine.alarm_keys() if k.kind == PROCESSING_FAULT]
            for key in keys:
                last = next((it for it in reversed(fresh) if it.reading is not None
                             and self._fault_key(it.reading.machine, it.reading) == key), None)
                if last is None:
                    continue
                r = last.reading
                rid = r.reading_id if isinstance(r, Waveform) else None
                last.transitions.extend(ev.engine.update(
                    key, r.ts, None, None, {"message": "readings of this stream are processed again"},
                    rid, persistence=1))

    def _retry(self, work: Callable[[], Any], machines: list[str]) -> Any:
        """Run a database unit of work until it commits, backing off between attempts
        while its errors are transient (:func:`is_transient`); a deterministic error, or
        any error once the service is stopping, is raised to the caller."""
        delay = DB_RETRY_MIN_S
        while True:
            try:
                out = work()
            except _Raced:
                # Another process stored one of these readings after our existence check:
                # run again; the check now sees it.
                self._forget(machines)
                self.metrics.batch_reruns.inc()
                continue
            except Exception as exc:
                self._forget(machines)
                if not is_transient(exc) or self._stop.is_set():
                    self._retry_ended(failed=True)
                    raise
                try:
                    self._retry_failed(exc, delay)
                except Exception:  # bookkeeping must never turn a retry into a set-aside
                    log.exception("recording a database retry failed")
                self._stop.wait(delay)
                delay = min(delay * 2, DB_RETRY_MAX_S)
                continue
            self._retry_ended(failed=False)
            return out

    def _retry_failed(self, exc: BaseException, delay: float) -> None:
        """Record a transient failure of this thread's unit of work for health and
        metrics; log the first, a change of error, and a reminder every LOG_REPEAT_S."""
        name = threading.current_thread().name
        now_m = time.monotonic()
        cause = short_cause(exc)
        with self._health_lock:
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
        self.metrics.db_retries.inc()
        self.metrics.db_errors.labels(error=type(exc).__name__).inc()
        if due:
            log.warning("database work failed; retrying", extra={
                "error": cause, "error_class": type(exc).__name__, "attempts": attempts,
                "failing_for_s": round(for_s, 1), "retry_in_s": delay, "worker": name})

    def _retry_ended(self, *, failed: bool) -> None:
        name = threading.current_thread().name
        with self._health_lock:
            st = self._retries.pop(name, None)
        if st is not None and not failed:
            log.info("database work succeeded again", extra={
                "attempts": st.attempts + 1, "failed_for_s": round(time.monotonic() - st.since_m, 1),
                "last_error": st.error, "worker": name})

    def _commit(self, items: list[_Item], *, check_all: bool = True) -> None:
        """One transaction for a batch (see :meth:`handle_batch`); sets each item's outcome.

        The existence query runs when ``check_all`` or any reading needs it (``_Item.check``);
        otherwise every reading is taken as new and a short insert raises :class:`_Raced`."""
        touched: dict[str, float] = {}
        with self._lock, self.store.write_transaction() as s:
            # Core statements run on the session's connection (same transaction): the ORM
            # Session's execute adds about as much per statement as SQLite takes.
            c = s.connection()
            stored_at = utcnow()
            for it in items:
                it.outcome = None
                if it.rejection is not None:
                    add_dead_letter(s, topic=it.topic, reason=it.rejection.reason,
                                    detail=it.rejection.detail, payload=it.payload)
                    it.outcome = Outcome("rejected", reason=it.rejection.reason)
            waves = [it for it in items if isinstance(it.reading, Waveform)]
            speeds = [it for it in items if isinstance(it.reading, SpeedReading)]
            if not (check_all or any(it.check for it in items if it.reading is not None)):
                waves = speeds = []
            have_w = existing_measurements(c, [_wkey(it.reading) for it in waves])
            have_s = existing_speed_readings(c, [_skey(it.reading) for it in speeds])
            fresh: list[_Item] = []
            for it in items:
                r = it.reading
                if r is None:
                    continue
                key = _wkey(r) if isinstance(r, Waveform) else _skey(r)
                seen = have_w if isinstance(r, Waveform) else have_s
                if key in seen:  # a redelivery (or a repeat within the batch)
                    it.outcome = Outcome("duplicate", machine=r.machine)
                    continue
                seen.add(key)  # type: ignore[arg-type]
                fresh.append(it)
            if not fresh:
                return
            for it in fresh:
                assert it.reading is not None
                touched[it.reading.machine] = max(it.reading.ts, touched.get(it.reading.machine, it.reading.ts))
            evaluators, acks = self._take_states(s, sorted(touched))
            cadence = self.settings.spectra.snapshot_interval_s or None
            kept = self._kept_snapshots(c, [it for it in fresh if it.analysis is not None], cadence)

            meas_rows: list[dict[str, Any]] = []
            bare_rows: list[dict[str, Any]] = []
            speed_rows: list[dict[str, Any]] = []
            snap_rows: list[dict[str, Any]] = []
            pending_json: list[tuple[dict[str, Any], ReadingEvaluation]] = []
            for it in fresh:
                r = it.reading
                ev = evaluators[r.machine]
                if isinstance(r, Waveform):
                    a = it.analysis
                    evaluation = ev.evaluate(a, r)
                    it.transitions = list(evaluation.transitions)
                    it.evaluation = evaluation
                    self._update_view(r.machine, evaluation)
                    if a is None:
                        # No spectrum to keep, but the reading still gets its one row
                        # (health flags and evaluation), so it is stored exactly once.
                        bare_rows.append({
                            "machine_id": r.machine, "point_id": r.point, "ts": to_datetime(r.ts),
                            "reading_id": r.reading_id, "speed_hz": r.speed_hz,
                            "speed_source": "measured" if r.speed_hz is not None else None,
                            "orders": [], "peaks": [], "zone": None,
                            "health": jsonable(evaluation.health), "evaluation": _evaluation_json(evaluation),
                            "stored_at": stored_at,
                        })
                        continue
                    meas_rows.append(measurement_values(
                        a, zone=evaluation.zone, health=evaluation.health, evaluation=None, stored_at=stored_at))
                    pending_json.append((meas_rows[-1], evaluation))
                    if it.transitions:
                        # Kept below as the transitions' evidence; counts for the cadence.
                        kept.setdefault((a.machine, a.point), []).append(to_datetime(a.ts))
                    elif self._snapshot_due(kept, a, cadence):
                        snap_rows.extend(snapshot_rows(a))
                else:
                    speed_rows.append({"machine_id": r.machine, "ts": to_datetime(r.ts), "speed_hz": float(r.speed_hz)})
                    it.transitions = ev.observe_speed(r) if r.speed_hz > 0 else []
                    view = self._views[r.machine]
                    view.speed_hz, view.speed_source = r.speed_hz, "measured"
            self._processing_resumed(evaluators, fresh)

            # The margin table is kept with the batch's last reading of each machine only:
            # the dashboard reads it from a machine's newest reading (and recomputes it
            # when absent), and building it for every reading is a sizeable share of the
            # per-reading cost.
            last_of_machine = {row["machine_id"]: i for i, (row, _) in enumerate(pending_json)}
            for i, (row, evaluation) in enumerate(pending_json):
                row["evaluation"] = _evaluation_json(
                    evaluation, margins=last_of_machine[row["machine_id"]] == i)

            # Stamped as late as possible: stored_at is what publish-to-commit latency uses.
            stored_at = utcnow()
            for row in (*meas_rows, *bare_rows):
                row["stored_at"] = stored_at
            mkeys = ("machine_id", "point_id", "ts")
            new = insert_many_ignore(c, Measurement.__table__, meas_rows, mkeys)
            new += insert_many_ignore(c, Measurement.__table__, bare_rows, mkeys)
            new += insert_many_ignore(c, SpeedReadingRow.__table__, speed_rows, ("machine_id", "ts"))
            if new != len(meas_rows) + len(bare_rows) + len(speed_rows):
                raise _Raced
            insert_many_ignore(c, SpectrumSnapshot.__table__, snap_rows, ("machine_id", "point_id", "ts", "kind"))

            # Alarm transitions in arrival order; each waveform's spectra are its evidence.
            acks_sent: set[str] = set()
            for it in fresh:
                r = it.reading
                trans = it.transitions
                ids: list[int] = []
                if trans:
                    evidence_id = None
                    if isinstance(r, Waveform) and it.analysis is not None:
                        for row in snapshot_rows(it.analysis, evidence=True):
                            sid = insert_ignore(s, SpectrumSnapshot.__table__, row,
                                                ("machine_id", "point_id", "ts", "kind"))
                            if sid is not None and (row["kind"] == "velocity" or evidence_id is None):
                                evidence_id = sid
                    ids = record_transitions(s, trans, spectrum_snapshot_id=evidence_id)
                mine = [] if r.machine in acks_sent else acks.get(r.machine, [])
                acks_sent.add(r.machine)
                kind = "waveform" if isinstance(r, Waveform) else "speed"
                it.outcome = Outcome(kind, machine=r.machine,
                                     events=self._events(s, trans, ids, mine) if trans or mine else [])
            self._save_states(c, touched)

            # The retained status once per machine: after its last waveform, or after its
            # last event when only speed readings came.
            for machine in touched:
                mine_out = [it for it in fresh if it.reading.machine == machine]
                carrier = next((it for it in reversed(mine_out)
                                if it.outcome.kind == "waveform" or it.outcome.events), None)
                if carrier is not None:
                    carrier.outcome.status = self._status(machine, evaluators[machine])
        self._saved(touched, kept)

    def _kept_snapshots(self, s: Any, waves: list[_Item], cadence: float | None
                        ) -> dict[tuple[str, str], list[dt.datetime]]:
        """Snapshot instants kept per point, enough to decide each reading's cadence: from
        this process's own commits when each reading has one inside its window (exact: a
        committed snapshot inside the window settles "not due"), else from one query."""
        if cadence is None or not waves:
            return {}
        window = dt.timedelta(seconds=cadence)
        tss = [to_datetime(it.reading.ts) for it in waves]
        points = [(it.reading.machine, it.reading.point) for it in waves]
        if all(any(ts - window < t <= ts for t in self._kept.get(p, ())) for p, ts in zip(points, tss, strict=True)):
            return {p: list(self._kept[p]) for p in set(points)}
        return snapshot_times(s, points, min(tss) - window, max(tss))

    @staticmethod
    def _snapshot_due(kept: dict[tuple[str, str], list[dt.datetime]], a: ReadingAnalysis,
                      cadence: float | None) -> bool:
        """No spectrum of the point kept in the ``cadence`` seconds up to this reading
        (counting those kept earlier in the batch); records this one when due."""
        if cadence is None:
            return False
        ts = to_datetime(a.ts)
        since = ts - dt.timedelta(seconds=cadence)
        times = kept.setdefault((a.machine, a.point), [])
        if any(since < t <= ts for t in times):
            return False
        times.append(ts)
        return True

    # -- outbound payloads

    def _events(self, s: Any, trans: Any, ids: list[int], outside: list[Transition]) -> list[dict[str, Any]]:
        """Alarm events (REST alarm JSON with its current state, plus the transition):
        first those made outside the readings and recorded already (``outside``: alarms
        closed by a registry change, acknowledgements), which came before the readings'
        own (``trans``, recorded as alarms ``ids``)."""
        out: list[dict[str, Any]] = []
        for t in outside:
            row = s.execute(select(Alarm).where(Alarm.ref == t.alarm_id).order_by(Alarm.id.desc()).limit(1)).scalar_one_or_none()
            body = alarm_as_json(row) if row is not None else dict(t.alarm)
            body.update(self._transition_fields(t))
            out.append(body)
        rows = {a.id: a for a in s.execute(select(Alarm).where(Alarm.id.in_(ids))).scalars()} if ids else {}
        for t, aid in zip(trans, ids, strict=False):
            row = rows.get(aid)
            body = alarm_as_json(row) if row is not None else dict(t.alarm)
            body.update(self._transition_fields(t))
            out.append(body)
        return out

    @staticmethod
    def _transition_fields(t: Transition) -> dict[str, Any]:
        return {
            "transition": t.name,
            "transition_at": iso_utc(t.ts),
            "previous_severity": t.previous_severity,
            "reading_id": t.reading_id,
            "ref": t.alarm_id,
        }

    def _copy_views(self, machines: list[str]) -> dict[str, _MachineView]:
        """Copies of the status views of ``machines``, to put back after a failed run."""
        return {m: _MachineView(v.ts, v.speed_hz, v.speed_source, dict(v.zones), v.nearest, list(v.unseen))
                for m in machines if (v := self._views.get(m)) is not None}

    def _update_view(self, machine: str, evaluation: ReadingEvaluation) -> None:
        view = self._views[machine]
        view.ts = max(view.ts or 0.0, evaluation.ts)
        view.zones[evaluation.point] = evaluation.zone
        if evaluation.speed_hz is not None:
            view.speed_hz = evaluation.speed_hz
        view.unseen.append(evaluation)

    def _status(self, machine: str, ev: MachineEvaluator) -> dict[str, Any]:
        view = self._views[machine]
        active = ev.engine.active()
        worst = max((a.severity for a in active), key=severity_rank, default=None)
        zones = [z for z in view.zones.values() if z]
        return {
            "machine": machine,
            "ts": iso_utc(view.ts),
            "state": worst or "normal",
            "speed_hz": view.speed_hz,
            "nearest_margin": view.nearest_margin(),
            "zone": max(zones) if zones else None,
            "zones": dict(view.zones),
            "active_alarms": [
                {"ref": a.id, "point": a.key.point, "kind": a.key.kind, "subject": a.key.subject,
                 "severity": a.severity, "state": a.state}
                for a in active
            ],
        }

    def publish(self, out: Outcome) -> None:
        """Hand an outcome's alarm events and status to the publisher (after the commit
        and the ack). QoS 1 without waiting for the broker: paho's outbound queue sends
        and resends them, so the worker never waits on a PUBACK."""
        if self.publisher is None or out.machine is None:
            return
        try:
            if self.settings.alarms.publish:
                for e in out.events:
                    self.publisher.publish_alarm(out.machine, e, wait=False)
            if self.settings.alarms.publish_status and out.status is not None:
                self.publisher.publish_status(out.machine, out.status, wait=False)
            if self.settings.alarms.publish_status and out.kind == "retired":
                # An empty retained message removes the status (docs/mqtt.md).
                self.publisher.clear_status(out.machine, wait=False)
        except MqttError as exc:
            self.metrics.publish_failures.inc()
            log.warning("publishing failed", extra={"machine": out.machine, "error": str(exc)})

    # -- MQTT glue

    def _on_batch(self, msgs: list[InboundMessage]) -> None:
        assert self.source is not None
        self.metrics.in_flight.set(self.source.stats.in_flight)
        outs = self.handle_batch([(m.topic, m.payload) for m in msgs], [m.dup for m in msgs])
        with self._health_lock:
            self._last_commit = (time.time(), time.monotonic())
        for m in msgs:
            self.source.ack(m)
        # Again after the acks, so an idle service does not show its last batch as in flight.
        self.metrics.in_flight.set(self.source.stats.in_flight)
        self._announce(outs)

    def _announce(self, outs: list[Outcome]) -> None:
        """Publish outcomes (after their commit), count and log their alarm transitions."""
        for out in outs:
            self.publish(out)
            for e in out.events:
                self.metrics.transitions.labels(transition=str(e.get("transition"))).inc()
                log.info("alarm transition", extra={
                    "machine": out.machine, "kind": e.get("kind"), "subject": e.get("subject"),
                    "transition": e.get("transition"), "severity": e.get("severity")})

    def start(self, *, wait_s: float = 15.0) -> None:
        """Connect, subscribe and start the periodic jobs (stale streams, retention)."""
        # The start-up heap (numpy, scipy, SQLAlchemy, paho: some 150,000 objects) never
        # becomes garbage, but every full collection walks it: 100-200 ms with the GIL
        # held, a stall of the worker every few seconds under load. Collected once here and
        # moved out of the collector's sight; later objects are collected as usual.
        from monitor.detection.kernels import (
            warm_up,  # numba loads in ~0.5 s: not for every command
        )

        warm_up()  # compiled now, not mid-batch; before the freeze (start-up heap too)
        gc.collect()
        gc.freeze()
        self.metrics.watch_health(self.health)
        if self.settings.service.metrics_address:
            # Up before the broker, so /readyz can say why a start is slow.
            self.metrics_server = MetricsServer(self.metrics, self.health, self.settings.service.metrics_address,
                                                ready=self.readiness)
            self.metrics_server.start()
        self._prober = threading.Thread(target=self._probe_loop, name="db-probe", daemon=True)
        self._prober.start()
        self._watcher = threading.Thread(target=self._watch_health, name="health-watch", daemon=True)
        self._watcher.start()
        self.publisher = Publisher(self.mqtt)
        try:
            self.publisher.start(wait_s)
        except MqttError as exc:
            raise ServiceError(str(exc)) from exc
        self.source = MessageSource(self.mqtt)
        self.source.start_batches(self._on_batch, self.max_batch)
        if not self.source.wait_subscribed(wait_s):
            raise ServiceError(
                f"no subscription at the broker {self.mqtt.url} within {wait_s:g} s"
                + (f" ({self.source.last_error})." if self.source.last_error else ".")
            )
        self._periodic = threading.Thread(target=self._periodic_loop, name="periodic", daemon=True)
        self._periodic.start()
        self._started = True
        log.info("service started", extra={
            "broker": self.mqtt.url, "client_id": self.mqtt.client_id,
            "shared_group": self.mqtt.share_group, "machines": len(self.registry.machines),
            "database": self.store.engine.url.render_as_string(hide_password=True)})

    def stop(self) -> None:
        """Stop taking messages, finish those handed off (commit, ack), disconnect."""
        self._stop.set()
        if self.source is not None:
            self.source.stop()
        if self.publisher is not None:
            self.publisher.stop()
        if self._periodic is not None:
            self._periodic.join(5.0)
        if self._prober is not None:
            self._prober.join(1.0)  # a probe waiting on a silent database ends with its timeouts
        if self.metrics_server is not None:
            self.metrics_server.stop()
        self._registry_follower.close()
        self.store.close()
        src = self.source
        get = self.metrics.registry.get_sample_value
        log.info("service stopped", extra={
            "received": src.stats.received if src else 0, "acked": src.stats.acked if src else 0,
            "batches": int(get("whirlwatch_batch_size_count") or 0),
            "db_retries": int(get("whirlwatch_db_retries_total") or 0),
            "batch_reruns": int(get("whirlwatch_batch_reruns_total") or 0),
        })

    def health(self) -> dict[str, Any]:
        """The health view (``/healthz``; docs/service.md, "Health"): ``ok`` is false, with
        the reasons in ``problems``, while the broker connection is down, the database
        does not answer its probe, readings have waited :data:`STALL_S` without a commit,
        or database work has been retried that long. Also: the backlog (messages received
        and not yet acknowledged), the age of the last commit, the retries under way."""
        now_m = time.monotonic()
        src, pub = self.source, self.publisher
        connected = bool(src and src.connected)
        pub_connected = bool(pub and pub.connected)
        backlog = src.stats.in_flight if src else 0
        waiting_s = src.waiting_s(now_m) if src else 0.0
        with self._health_lock:
            retries = [dict(st.to_json(now_m), worker=name) for name, st in sorted(self._retries.items())]
            last = self._last_commit
            probe = dict(self._probe)
        db = self._database_view(probe, now_m)
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
            "rejected": self.rejections.counts(),
            "processing_errors": self._set_aside_count,
            "machines": len(self.registry.machines),
        }

    @staticmethod
    def _database_view(probe: dict[str, Any], now_m: float) -> dict[str, Any]:
        """The database part of the health view from the probe's last result: not ok
        after a failed probe, or while one has waited more than :data:`PROBE_LIMIT_S`."""
        pending = now_m - probe["started_m"] if probe["started_m"] is not None else 0.0
        ok = probe["ok"] is not False and pending <= PROBE_LIMIT_S
        error = probe["error"] if probe["ok"] is False else None
        if pending > PROBE_LIMIT_S:
            error = f"no answer for {pending:.0f} s"
        return {
            "ok": ok,
            "error": error,
            "checked_age_s": None if probe["at_m"] is None else round(now_m - probe["at_m"], 1),
            "probe_waiting_s": round(pending, 1),
        }

    def readiness(self) -> dict[str, Any]:
        """The readiness view (``/readyz``): started, subscribed, the database answered
        its last probe, and healthy."""
        h = self.health()
        problems = list(h["problems"])
        if not self._started:
            problems.insert(0, "starting")
        elif self.source is not None and not self.source.wait_subscribed(0):
            problems.append("not subscribed")
        with self._health_lock:
            probed = self._probe["ok"]
        if probed is None:
            problems.append("database not probed yet")
        return {"ready": not problems, "problems": problems}

    def probe_database(self) -> bool:
        """Ask the database a one-row question; record the answer for health. Logged
        when the answer changes (bad after good, good again after bad)."""
        with self._health_lock:
            self._probe["started_m"] = time.monotonic()
        try:
            with self.store.engine.connect() as c:
                c.exec_driver_sql("SELECT 1 FROM machines LIMIT 1").all()
            ok, error = True, None
        except Exception as exc:
            ok, error = False, short_cause(exc)
        with self._health_lock:
            was = self._probe["ok"]
            self._probe.update(ok=ok, error=error, at_m=time.monotonic(), started_m=None)
        if not ok and was is not False:
            log.warning("database probe failed", extra={"error": error})
        elif ok and was is False:
            log.info("database answers again")
        return ok

    def _probe_loop(self) -> None:
        while not self._stop.is_set():
            self.probe_database()
            self._stop.wait(PROBE_EVERY_S)

    def _watch_health(self) -> None:
        """Log each change of health (with its problems), so an outage is in the log even
        when nobody asks /healthz and nothing fails outright (a silent database only
        makes work wait). Touches neither the database nor the broker."""
        was: list[str] = []
        while not self._stop.wait(1.0):
            problems = self.health()["problems"]
            if problems and not was:
                log.warning("service unhealthy", extra={"problems": problems})
            elif was and not problems:
                log.info("service healthy again")
            was = problems

    def wait(self, timeout_s: float | None = None) -> bool:
        return self._stop.wait(timeout_s)

    # -- periodic jobs

    def _periodic_loop(self) -> None:
        start = time.monotonic()
        last = {"stale": start, "acks": start, "retention": start, "gauges": start}

        def due(job: str, every_s: float, now_m: float) -> bool:
            if now_m - last[job] < every_s:
                return False
            last[job] = now_m
            return True

        while not self._stop.wait(0.5):
            now_m = time.monotonic()
            self._job("registry edits and baseline restarts", self.apply_registry_requests)
            if self._sqlite:
                self._job("checkpoint", self._checkpoint)
            if self.stale_check_s > 0 and due("stale", self.stale_check_s, now_m):
                self._job("stale streams", self.check_stale)
            if due("acks", ACK_SYNC_S, now_m):
                self._job("acknowledgements", self.sync_acknowledgements)
            r = self.settings.retention
            if r.enabled and due("retention", r.interval_s, now_m):
                self._job("retention", self._apply_retention)
            if due("gauges", 5.0, now_m):
                self._job("alarm gauges", self._refresh_alarm_gauges)

    def _job(self, name: str, fn: Callable[[], Any]) -> None:
        """Run one periodic job; a failure is logged (once per LOG_REPEAT_S per job) and
        never ends the loop."""
        try:
            fn()
        except Exception as exc:
            now_m = time.monotonic()
            if now_m - self._job_errors.get(name, -math.inf) >= LOG_REPEAT_S:
                self._job_errors[name] = now_m
                log.warning("periodic job failed", extra={"job": name, "error": short_cause(exc)})

    def _checkpoint(self) -> None:
        with self.store.engine.connect() as c:
            c.exec_driver_sql("PRAGMA wal_checkpoint(PASSIVE)")

    def _apply_retention(self) -> None:
        with self.store.transaction() as s:
            s.connection(execution_options={"silence_limit_s": RETENTION_SILENCE_LIMIT_S})
            res = apply_retention(s, self.settings.retention.policy())
        log.info("retention applied", extra={"result": str(res)})

    def _refresh_alarm_gauges(self) -> None:
        with self.store.session() as s:
            self.metrics.set_alarm_states(alarm_counts_by_state(s))

    # -- changes made outside the readings

    def _machines_to_sync(self) -> list[str]:
        """Machines with a change made outside the readings that their detector has not
        applied yet: an alarm acknowledged in the dashboard that the detector still holds
        as active. One query, and only while some detector holds an active alarm."""
        with self._lock:
            active = {(m, a.id) for m, ev in self._evaluators.items()
                      for a in ev.engine.active() if a.state == "active"}
        if not active:
            return []
        with self.store.session() as s:
            rows = s.execute(self._acks_statement(), {
                "machines": sorted({m for m, _ in active}), "refs": sorted({r for _, r in active})}).all()
        return sorted({m for m, ref, *_ in rows if (m, ref) in active})

    def sync_acknowledgements(self) -> list[dict[str, Any]]:
        """Apply the acknowledgements made in the dashboard to the detectors now, not at
        the machines' next readings, and publish them (alarm events and retained status);
        run every :data:`ACK_SYNC_S` by the periodic loop. Returns the events."""
        outs: list[Outcome] = []
        for machine in self._machines_to_sync():
            def work(mid: str = machine) -> Outcome | None:
                with self._lock, self.store.write_transaction() as s:
                    evaluators, acks = self._take_states(s, [mid])
                    mine = acks.get(mid, [])
                    if not mine:
                        return None  # another process applied them (its copy was newer)
                    self._save_states(s, {mid: self.clock()})
                    out = Outcome("acknowledged", machine=mid, events=self._events(s, [], [], mine),
                                  status=self._status(mid, evaluators[mid]))
                self._saved([mid])
                return out

            o = self._retry(work, [machine])
            if o is not None:
                outs.append(o)
        self._announce(outs)
        return [e for o in outs for e in o.events]

    def check_stale(self) -> list[dict[str, Any]]:
        """Raise stale-stream alarms as of the clock; publish them; return the events."""
        now = self.clock()
        outs: list[Outcome] = []
        for m in self.registry.machines:
            def work(mid: str = m.id) -> Outcome | None:
                with self._lock, self.store.write_transaction() as s:
                    evs, outside = self._take_states(s, [mid], acks=False)
                    ev, closed = evs[mid], outside.get(mid, [])
                    trans = ev.check_stale(now)
                    if not (trans or closed):
                        return None
                    ids = record_transitions(s, trans) if trans else []
                    self._save_states(s, {mid: now})
                    out = Outcome("stale", machine=mid, events=self._events(s, trans, ids, closed),
                                  status=self._status(mid, ev))
                self._saved([mid])
                return out

            o = self._retry(work, [m.id])
            if o is not None:
                outs.append(o)
        self._announce(outs)
        return [e for o in outs for e in o.events]


def run_service(service: Service, *, install_signals: bool = True) -> None:
    """Start ``service`` and block until SIGTERM/SIGINT (or ``service.stop``)."""
    import signal

    stop = threading.Event()
    if install_signals:
        for sig in (signal.SIGTERM, signal.SIGINT):
            signal.signal(sig, lambda *_: stop.set())
    service.start()
    try:
        while not stop.wait(0.5) and not service.wait(0):
            pass
    finally:
        service.stop()
