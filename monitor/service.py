"""The service loop: MQTT in, analysis and detection, one SQL transaction, ack, MQTT out.

Per inbound message, in this order (docs/service.md):

1. decode and validate (:func:`monitor.ingest.decode_message`); a rejection is counted,
   its dead letter committed, the message acknowledged, done;
2. waveforms: analyse (pure, outside any transaction);
3. one transaction: skip if the (machine, point, ts) measurement is already stored (a
   redelivery is never fed to the detector twice), take the machine's detector state
   (row lock on PostgreSQL) and reload it when another process wrote a newer version,
   apply acknowledgements made in the dashboard, evaluate, write the measurement, spectra,
   alarm transitions and the new detector state;
4. commit, then acknowledge the MQTT message;
5. publish each alarm transition (QoS 1) and the retained machine status.

A crash at any instant leaves either nothing or everything of a reading committed, and
the message unacknowledged until it is: the broker redelivers, the store ignores the
replay. Database errors are retried with back-off while the service runs; the message is
left unacknowledged when it stops.

Exceptions::

    RuntimeError
     +-- ServiceError     the service cannot start (no schema, empty registry, ...)
"""

from __future__ import annotations

import datetime as dt
import json
import logging
import socket
import sys
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import func, select

from monitor.alarms import Transition, severity_rank
from monitor.analysis import analyse_waveform
from monitor.config import Settings
from monitor.detection import MachineEvaluator, ReadingEvaluation
from monitor.ingest import SPEED_STREAM, IngestLimits, Rejected, RejectionCounter, decode_message
from monitor.metrics import MetricsServer, ServiceMetrics
from monitor.mqtt import InboundMessage, MessageSource, MqttError, MqttSettings, Publisher
from monitor.readings import SpeedReading, Waveform
from monitor.registry import Registry, load_registry
from monitor.store import (
    Store,
    add_dead_letter,
    apply_retention,
    export_registry,
    import_registry,
    record_transitions,
    save_detector_state,
    write_reading,
    write_speed_reading,
)
from monitor.store.models import Alarm, DetectorState, Measurement, utcnow
from monitor.store.queries import alarm_as_json, alarm_counts_by_state
from monitor.store.writes import insert_ignore, jsonable, to_datetime

log = logging.getLogger("whirlwatch.service")

#: Back-off of database retries, s (doubling up to the maximum).
DB_RETRY_MIN_S = 0.2
DB_RETRY_MAX_S = 10.0


class ServiceError(RuntimeError):
    """The service cannot start; the message says why in one sentence."""


# ----------------------------------------------------------------------------- logging


class JsonLineFormatter(logging.Formatter):
    """One JSON object per log line: ts, level, logger, msg and any ``extra`` fields."""

    _skip = frozenset(logging.LogRecord("", 0, "", 0, "", (), None).__dict__) | {"message"}

    def format(self, record: logging.LogRecord) -> str:
        out: dict[str, Any] = {
            "ts": dt.datetime.fromtimestamp(record.created, dt.UTC).isoformat(timespec="milliseconds"),
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
    """Send the service's logs to ``stream`` (stderr) as JSON lines at ``level``."""
    handler = logging.StreamHandler(stream or sys.stderr)
    handler.setFormatter(JsonLineFormatter())
    root = logging.getLogger()
    root.handlers[:] = [handler]
    root.setLevel(level.upper())


# ----------------------------------------------------------------------------- outcome


@dataclass
class Outcome:
    """What became of one message (returned by :meth:`Service.handle` for tests/benches)."""

    kind: str  # "waveform", "speed", "rejected", "duplicate"
    machine: str | None = None
    reason: str | None = None
    events: list[dict[str, Any]] = field(default_factory=list)
    status: dict[str, Any] | None = None


@dataclass
class _MachineView:
    """Latest facts of one machine for its retained status."""

    ts: float | None = None
    speed_hz: float | None = None
    speed_source: str | None = None
    zones: dict[str, str | None] = field(default_factory=dict)
    nearest: dict[str, Any] | None = None


# ----------------------------------------------------------------------------- service


def default_client_id(group: str) -> str:
    """A client id stable across restarts of this process on this host."""
    return f"whirlwatch-{socket.gethostname()}-{group or 'solo'}"[:128]


def mqtt_settings(settings: Settings, client_id: str | None = None) -> MqttSettings:
    """The transport settings of the service file's ``[broker]`` table."""
    b = settings.broker
    return MqttSettings(
        url=b.url,
        username=b.username or None,
        password=b.password or None,
        ca_file=b.ca_file or None,
        cert_file=b.cert_file or None,
        key_file=b.key_file or None,
        client_id=client_id or b.client_id or default_client_id(b.shared_group),
        protocol=b.protocol,
        session_expiry_s=b.session_expiry_s,
        keepalive_s=b.keepalive_s,
        receive_maximum=b.receive_maximum,
        prefix=b.topic_prefix,
        share_group=b.shared_group or None,
        reconnect_max_s=max(1.0, b.reconnect_max_s),
    )


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
    ) -> None:
        self.settings = settings
        self.limits = limits or IngestLimits()
        self.clock = clock or time.time
        self.stale_check_s = stale_check_s
        self.mqtt = mqtt_settings(settings, client_id)
        self.prefix = settings.broker.topic_prefix
        self.rejections = RejectionCounter(60.0)
        self.metrics = ServiceMetrics()
        self.store = Store.open(settings.database.url, busy_timeout_ms=settings.database.busy_timeout_ms)
        self._pg = self.store.engine.dialect.name == "postgresql"
        self.registry = self._load_registry()
        self._evaluators: dict[str, MachineEvaluator] = {}
        self._versions: dict[str, int | None] = {}
        self._views: dict[str, _MachineView] = {m.id: _MachineView() for m in self.registry.machines}
        self._last_ts: dict[tuple[str, str], float] = {}
        self._lock = threading.RLock()
        self._stop = threading.Event()
        self._periodic: threading.Thread | None = None
        self.source: MessageSource | None = None
        self.publisher: Publisher | None = None
        self.metrics_server: MetricsServer | None = None
        self._load_state()

    # -- start-up

    def _load_registry(self) -> Registry:
        path = self.settings.service.machines_file
        try:
            if path:
                registry = load_registry(path)
                with self.store.transaction() as s:
                    import_registry(s, registry, user="service start")
            with self.store.session() as s:
                registry = export_registry(s)
        except ValueError as exc:
            raise ServiceError(str(exc)) from exc
        registry = Registry(machines=tuple(m for m in registry.machines))
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
        for m, p, ts in rows:
            if ts is not None:
                self._last_ts[(m, p)] = ts.timestamp()
        for m in self.registry.machines:
            self._evaluators[m.id] = MachineEvaluator(m)
            self._versions[m.id] = None  # loaded from the database on first use

    # -- detector state

    def _take_state(self, s: Any, machine: str) -> tuple[MachineEvaluator, int]:
        """Lock (PostgreSQL) and read the stored state; reload the evaluator if it moved on."""
        stmt = select(DetectorState).where(DetectorState.machine_id == machine)
        if self._pg:
            stmt = stmt.with_for_update()
        row = s.execute(stmt).scalar_one_or_none()
        stored = row.state if row is not None else None
        version = int(stored.get("version", 0)) if isinstance(stored, dict) else 0
        if self._versions.get(machine) != version:
            spec = self.registry.machine(machine)
            if isinstance(stored, dict) and "evaluator" in stored:
                self._evaluators[machine] = MachineEvaluator.restore(spec, stored["evaluator"])
            else:
                self._evaluators[machine] = MachineEvaluator(spec)
            self._versions[machine] = version
        return self._evaluators[machine], version

    def _sync_acks(self, s: Any, machine: str, ev: MachineEvaluator) -> list[Transition]:
        """Acknowledgements made in the dashboard, applied to the detector (and returned
        for publishing; the dashboard has stored them already)."""
        active = {a.id: a for a in ev.engine.active() if a.state == "active"}
        if not active:
            return []
        rows = s.execute(
            select(Alarm.ref, Alarm.acknowledged_by, Alarm.acknowledged_at, Alarm.ack_comment).where(
                Alarm.machine_id == machine,
                Alarm.state == "acknowledged",
                Alarm.ref.in_(list(active)),
            )
        ).all()
        out = []
        for ref, user, at, comment in rows:
            when = at.timestamp() if at is not None else self.clock()
            out.append(ev.acknowledge(ref, user or "unknown", comment or "", when))
        return out

    def _save_state(self, s: Any, machine: str, ev: MachineEvaluator, version: int, ts: float) -> None:
        save_detector_state(s, machine, {"version": version + 1, "evaluator": ev.snapshot()}, ts)

    def _forget(self, machine: str | None) -> None:
        """After a failed transaction the in-memory evaluator may be ahead of the database."""
        if machine is not None:
            self._versions[machine] = None

    # -- messages

    def _last(self, machine: str, point: str) -> float | None:
        return self._last_ts.get((machine, point))

    def handle(self, topic: str, payload: bytes) -> Outcome:
        """Process one message up to the commit (no MQTT); see the module docstring."""
        t0 = time.perf_counter()
        now = self.clock()
        try:
            reading = decode_message(
                topic, payload, self.registry, prefix=self.prefix, now=now,
                last_ts=self._last, limits=self.limits,
            )
        except Rejected as rej:
            self._reject(topic, payload, rej)
            self.metrics.observe(time.perf_counter() - t0)
            return Outcome("rejected", reason=rej.reason)
        out = self._waveform(reading) if isinstance(reading, Waveform) else self._speed(reading)
        self.metrics.messages_in.labels(kind=out.kind).inc()
        self.metrics.observe(time.perf_counter() - t0)
        return out

    def _reject(self, topic: str, payload: bytes, rej: Rejected) -> None:
        self.metrics.rejected.labels(reason=rej.reason).inc()
        self.metrics.messages_in.labels(kind="rejected").inc()
        if self.rejections.record(rej.reason, time.monotonic()):
            log.warning(
                "message rejected",
                extra={"reason": rej.reason, "detail": rej.detail, "topic": topic[:200],
                       "suppressed_since_last": self.rejections.take_suppressed(rej.reason)},
            )
        self._retry(lambda: self._dead_letter(topic, payload, rej), None)

    def _dead_letter(self, topic: str, payload: bytes, rej: Rejected) -> None:
        with self.store.transaction() as s:
            add_dead_letter(s, topic=topic, reason=rej.reason, detail=rej.detail, payload=payload)

    def _retry(self, work: Callable[[], Any], machine: str | None) -> Any:
        """Run a database unit of work until it commits; back off between attempts."""
        delay = DB_RETRY_MIN_S
        while True:
            try:
                return work()
            except Exception as exc:
                self._forget(machine)
                if self._stop.is_set():
                    raise
                log.warning("database work failed; retrying", extra={"error": str(exc)[:300], "retry_in_s": delay})
                self.metrics.db_retries.inc()
                time.sleep(delay)
                delay = min(delay * 2, DB_RETRY_MAX_S)

    def _waveform(self, w: Waveform) -> Outcome:
        machine = self.registry.machine(w.machine)
        point = machine.point(w.point)
        analysis = None
        try:
            analysis = analyse_waveform(w, machine, point)
        except Exception as exc:
            # A waveform the analysis cannot use (a dead sensor's flat zeros, too short for
            # the speed range, ...): health checks still run on it and sensor-fault alarms
            # follow; one bad block must not stall the stream behind it.
            log.warning("analysis failed", extra={
                "machine": w.machine, "point": w.point, "error": f"{type(exc).__name__}: {exc}"[:200]})

        def work() -> Outcome:
            with self._lock, self.store.transaction() as s:
                exists = s.execute(
                    select(Measurement.id).where(
                        Measurement.machine_id == w.machine,
                        Measurement.point_id == w.point,
                        Measurement.ts == to_datetime(w.ts),
                    ).limit(1)
                ).scalar_one_or_none()
                if exists is not None:
                    return Outcome("duplicate", machine=w.machine)
                ev, version = self._take_state(s, w.machine)
                acks = self._sync_acks(s, w.machine, ev)
                evaluation = ev.evaluate(analysis, w)
                if analysis is None:
                    # No spectrum to keep, but the reading still gets its one row (health
                    # flags and evaluation), so it is stored exactly once like any other.
                    mid = insert_ignore(s, Measurement.__table__, {
                        "machine_id": w.machine, "point_id": w.point, "ts": to_datetime(w.ts),
                        "reading_id": w.reading_id, "speed_hz": w.speed_hz,
                        "speed_source": "measured" if w.speed_hz is not None else None,
                        "orders": [], "peaks": [], "zone": None,
                        "health": jsonable(evaluation.health), "evaluation": jsonable(evaluation),
                        "stored_at": utcnow(),
                    }, ("machine_id", "point_id", "ts"))
                    if mid is None:
                        self._forget(w.machine)
                        return Outcome("duplicate", machine=w.machine)
                    ids = record_transitions(s, evaluation.transitions)
                    self._save_state(s, w.machine, ev, version, w.ts)
                    events = self._events(s, evaluation.transitions, ids, acks)
                    self._versions[w.machine] = version + 1
                    return Outcome("waveform", machine=w.machine, events=events,
                                   status=self._status(s, w.machine, ev, evaluation))
                result = write_reading(
                    s, analysis, zone=evaluation.zone, health=evaluation.health,
                    evaluation=evaluation, transitions=evaluation.transitions,
                    snapshot_interval_s=self.settings.spectra.snapshot_interval_s or None,
                    detector_state={"version": version + 1, "evaluator": ev.snapshot()},
                )
                if not result.inserted:
                    # Another process stored it between our check and our insert.
                    self._forget(w.machine)
                    return Outcome("duplicate", machine=w.machine)
                events = self._events(s, evaluation.transitions, list(result.alarm_ids), acks)
                status = self._status(s, w.machine, ev, evaluation)
                self._versions[w.machine] = version + 1
                return Outcome("waveform", machine=w.machine, events=events, status=status)

        out = self._retry(work, w.machine)
        if out.kind == "waveform":
            self._last_ts[(w.machine, w.point)] = max(w.ts, self._last_ts.get((w.machine, w.point), 0.0))
        return out

    def _speed(self, r: SpeedReading) -> Outcome:
        def work() -> Outcome:
            with self._lock, self.store.transaction() as s:
                if not write_speed_reading(s, r):
                    return Outcome("duplicate", machine=r.machine)
                ev, version = self._take_state(s, r.machine)
                acks = self._sync_acks(s, r.machine, ev)
                trans = ev.observe_speed(r) if r.speed_hz > 0 else []
                ids = record_transitions(s, trans)
                self._save_state(s, r.machine, ev, version, r.ts)
                view = self._views[r.machine]
                view.speed_hz, view.speed_source = r.speed_hz, "measured"
                events = self._events(s, trans, ids, acks)
                status = self._status(s, r.machine, ev, None) if events else None
                self._versions[r.machine] = version + 1
                return Outcome("speed", machine=r.machine, events=events, status=status)

        out = self._retry(work, r.machine)
        if out.kind == "speed":
            key = (r.machine, SPEED_STREAM)
            self._last_ts[key] = max(r.ts, self._last_ts.get(key, 0.0))
        return out

    # -- outbound payloads

    def _events(self, s: Any, trans: Any, ids: list[int], acks: list[Transition]) -> list[dict[str, Any]]:
        """Alarm events (REST alarm JSON with its current state, plus the transition)."""
        out: list[dict[str, Any]] = []
        rows = {a.id: a for a in s.execute(select(Alarm).where(Alarm.id.in_(ids))).scalars()} if ids else {}
        for t, aid in zip(trans, ids, strict=False):
            row = rows.get(aid)
            body = alarm_as_json(row) if row is not None else dict(t.alarm)
            body.update(self._transition_fields(t))
            out.append(body)
        for t in acks:
            row = s.execute(select(Alarm).where(Alarm.ref == t.alarm_id).order_by(Alarm.id.desc()).limit(1)).scalar_one_or_none()
            body = alarm_as_json(row) if row is not None else dict(t.alarm)
            body.update(self._transition_fields(t))
            out.append(body)
        return out

    @staticmethod
    def _transition_fields(t: Transition) -> dict[str, Any]:
        return {
            "transition": t.name,
            "transition_at": dt.datetime.fromtimestamp(t.ts, dt.UTC).isoformat().replace("+00:00", "Z"),
            "previous_severity": t.previous_severity,
            "reading_id": t.reading_id,
            "ref": t.alarm_id,
        }

    def _status(
        self, s: Any, machine: str, ev: MachineEvaluator, evaluation: ReadingEvaluation | None
    ) -> dict[str, Any]:
        view = self._views[machine]
        if evaluation is not None:
            view.ts = max(view.ts or 0.0, evaluation.ts)
            view.zones[evaluation.point] = evaluation.zone
            if evaluation.speed_hz is not None:
                view.speed_hz = evaluation.speed_hz
            if evaluation.margins:
                m = min(evaluation.margins, key=lambda r: r.margin_pct - r.required_pct)
                view.nearest = {
                    "subject": m.subject, "margin_pct": m.margin_pct,
                    "required_pct": m.required_pct, "status": m.status,
                }
        active = ev.engine.active()
        worst = max((a.severity for a in active), key=severity_rank, default=None)
        zones = [z for z in view.zones.values() if z]
        return {
            "machine": machine,
            "ts": None if view.ts is None else dt.datetime.fromtimestamp(view.ts, dt.UTC).isoformat().replace("+00:00", "Z"),
            "state": worst or "normal",
            "speed_hz": view.speed_hz,
            "nearest_margin": view.nearest,
            "zone": max(zones) if zones else None,
            "zones": dict(view.zones),
            "active_alarms": [
                {"ref": a.id, "point": a.key.point, "kind": a.key.kind, "subject": a.key.subject,
                 "severity": a.severity, "state": a.state}
                for a in active
            ],
        }

    def publish(self, out: Outcome) -> None:
        """Send an outcome's alarm events and status (after the commit and the ack)."""
        if self.publisher is None or out.machine is None:
            return
        try:
            if self.settings.alarms.publish:
                for e in out.events:
                    self.publisher.publish_alarm(out.machine, e)
            if self.settings.alarms.publish_status and out.status is not None:
                self.publisher.publish_status(out.machine, out.status)
        except MqttError as exc:
            self.metrics.publish_failures.inc()
            log.warning("publishing failed", extra={"machine": out.machine, "error": str(exc)})

    # -- MQTT glue

    def _on_message(self, msg: InboundMessage) -> None:
        self.metrics.in_flight.set(self.source.stats.in_flight if self.source else 0)
        out = self.handle(msg.topic, msg.payload)
        assert self.source is not None
        self.source.ack(msg)
        self.publish(out)
        if out.events:
            for e in out.events:
                self.metrics.transitions.labels(transition=str(e.get("transition"))).inc()
                log.info("alarm transition", extra={
                    "machine": out.machine, "kind": e.get("kind"), "subject": e.get("subject"),
                    "transition": e.get("transition"), "severity": e.get("severity")})

    def start(self, *, wait_s: float = 15.0) -> None:
        """Connect, subscribe and start the periodic jobs (stale streams, retention)."""
        self.publisher = Publisher(self.mqtt)
        try:
            self.publisher.start(wait_s)
        except MqttError as exc:
            raise ServiceError(str(exc)) from exc
        self.source = MessageSource(self.mqtt)
        self.source.start(self._on_message)
        if not self.source.wait_subscribed(wait_s):
            raise ServiceError(
                f"no subscription at the broker {self.mqtt.url} within {wait_s:g} s"
                + (f" ({self.source.last_error})." if self.source.last_error else ".")
            )
        if self.settings.service.metrics_address:
            self.metrics_server = MetricsServer(self.metrics, self.health, self.settings.service.metrics_address)
            self.metrics_server.start()
        self._periodic = threading.Thread(target=self._periodic_loop, name="periodic", daemon=True)
        self._periodic.start()
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
        if self.metrics_server is not None:
            self.metrics_server.stop()
        self.store.close()
        log.info("service stopped")

    def health(self) -> dict[str, Any]:
        """The health view: connected to the broker, messages in flight and handled."""
        src = self.source
        connected = bool(src and src.connected)
        return {
            "ok": connected and not self._stop.is_set(),
            "connected": connected,
            "in_flight": src.stats.in_flight if src else 0,
            "received": src.stats.received if src else 0,
            "acked": src.stats.acked if src else 0,
            "rejected": self.rejections.counts(),
            "machines": len(self.registry.machines),
        }

    def wait(self, timeout_s: float | None = None) -> bool:
        return self._stop.wait(timeout_s)

    # -- periodic jobs

    def _periodic_loop(self) -> None:
        last_stale = last_gauges = time.monotonic()
        last_retention = time.monotonic()
        while not self._stop.wait(0.5):
            now_m = time.monotonic()
            try:
                if self.stale_check_s > 0 and now_m - last_stale >= self.stale_check_s:
                    last_stale = now_m
                    self.check_stale()
                r = self.settings.retention
                if r.enabled and now_m - last_retention >= r.interval_s:
                    last_retention = now_m
                    with self.store.transaction() as s:
                        res = apply_retention(s, r.policy())
                    log.info("retention applied", extra={"result": str(res)})
                if now_m - last_gauges >= 5.0:
                    last_gauges = now_m
                    with self.store.session() as s:
                        self.metrics.set_alarm_states(alarm_counts_by_state(s))
            except Exception as exc:  # a periodic job must not end the service
                log.warning("periodic job failed", extra={"error": str(exc)[:300]})

    def check_stale(self) -> list[dict[str, Any]]:
        """Raise stale-stream alarms as of the clock; publish them; return the events."""
        now = self.clock()
        outs: list[Outcome] = []
        for m in self.registry.machines:
            def work(mid: str = m.id) -> Outcome | None:
                with self._lock, self.store.transaction() as s:
                    ev, version = self._take_state(s, mid)
                    trans = ev.check_stale(now)
                    if not trans:
                        return None
                    ids = record_transitions(s, trans)
                    self._save_state(s, mid, ev, version, now)
                    out = Outcome("stale", machine=mid, events=self._events(s, trans, ids, []),
                                  status=self._status(s, mid, ev, None))
                    self._versions[mid] = version + 1
                    return out

            o = self._retry(work, m.id)
            if o is not None:
                outs.append(o)
                self.publish(o)
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
