"""The service: readings in from a source, analysis and detection, one SQL transaction per
batch, acknowledgement, status and alarms out over MQTT.

Per batch of messages (those already waiting at the source, at most :data:`MAX_BATCH`;
never waiting for more), in this order (docs/service.md):

1. decode and validate each, analyse each waveform (pure, outside any transaction;
   monitor/service/items.py);
2. one transaction (monitor/service/batch.py): dead letters, the duplicate check, the
   detector states of the machines touched, evaluation in arrival order, the rows, the
   alarm transitions with their evidence, each machine's detector state written once;
3. commit, then acknowledge every message of the batch;
4. hand each alarm transition and at most one retained status per machine to the
   publisher's outbound queue (QoS 1, not waiting for the PUBACKs), and each alarm
   transition to the notifier's queues (monitor/notify/dispatch.py, not waiting either).

A crash at any instant leaves either nothing or everything of a batch committed, and its
messages unacknowledged until it is: the broker redelivers, the existence check skips the
replay. A transient database error is retried; a batch that fails deterministically is
split until the reading that fails is alone and set aside (monitor/service/failures.py,
monitor/service/isolation.py). Beside the batches, the periodic thread follows registry
edits, raises stale-stream alarms and applies acknowledgements made in the dashboard
(monitor/service/periodic.py); health and readiness are in monitor/service/health.py.

The service depends on the source interface (monitor/io/source.py): by default an MQTT
:class:`~monitor.io.mqtt_source.MessageSource` on the broker of the settings, or any source
given, such as a stream file (:class:`~monitor.io.source.StreamFileSource`).

Exceptions::

    RuntimeError
     +-- ServiceError     the service cannot start (no schema, empty registry, ...)
"""

from __future__ import annotations

import gc
import logging
import threading
import time
from collections.abc import Callable, Sequence
from typing import Any

from sqlalchemy import event

from monitor.detection.evaluator import MachineEvaluator
from monitor.io.ingest_limits import IngestLimits, Rejected
from monitor.io.mqtt_publisher import Publisher
from monitor.io.mqtt_settings import MqttError, MqttSettings
from monitor.io.mqtt_source import MessageSource
from monitor.io.rejection_count import RejectionCounter
from monitor.io.source import Message, Source
from monitor.metrics import MetricsServer, ServiceMetrics
from monitor.model.registry import Registry
from monitor.notify.dispatch import Notifier
from monitor.service.cadence import SnapshotCadence
from monitor.service.core import Core
from monitor.service.failures import Retrier
from monitor.service.health import Health
from monitor.service.isolation import commit_isolating
from monitor.service.items import (
    Outcome,
    OutcomeKind,
    RejectedMessage,
    StreamKey,
    decode_batch,
)
from monitor.service.payloads import StatusBoard
from monitor.service.periodic import (
    ACK_SYNC_S,
    GAUGES_S,
    PeriodicJob,
    apply_retention_now,
    check_stale,
    checkpoint,
    refresh_alarm_gauges,
    run_jobs,
    sync_acknowledgements,
)
from monitor.service.registry_changes import RegistryChanges
from monitor.service.registry_follow import RegistryFollower, start_registry
from monitor.service.states import DetectorStates
from monitor.service.suppression import UNSHELVE_S, unshelve_expired
from monitor.settings import Settings
from monitor.store import Store
from monitor.store.reads import StartState, start_state

log = logging.getLogger("whirlwatch.service")

#: Most messages taken from the source into one transaction (group commit).
MAX_BATCH = 32
#: A PostgreSQL statement, commit or ping without an answer this long has its connection
#: closed (store/db.py SilenceWatchdog), s; retention's deletes may take longer
#: (monitor/service/periodic.py).
SILENCE_LIMIT_S = 15.0


class ServiceError(RuntimeError):
    """The service cannot start; the message says why in one sentence."""


def load_registry_for(store: Store, machines_file: str | None) -> tuple[Registry, RegistryFollower]:
    """The registry a service starts with and its follower (the file, if given, adds and
    updates, never deletes: monitor/service/registry_follow.py); ServiceError when the
    file is bad or the database holds no machines."""
    try:
        registry, follower = start_registry(store, machines_file)
    except ValueError as exc:
        raise ServiceError(str(exc)) from exc
    if not registry.machines:
        raise ServiceError(
            "the database holds no machines; import a registry with `whirlwatch machines "
            "import FILE` or pass --machines FILE."
        )
    return registry, follower


def read_start_state(store: Store) -> StartState:
    """The latest stored waveform of each stream, the machines with alarms open, and the
    retired machines not yet settled: registry changes made while the service was
    stopped are settled at its first periodic pass."""
    with store.session() as s:
        return start_state(s)


def _no_autocheckpoint(dbapi_connection: Any, _record: Any) -> None:
    cur = dbapi_connection.cursor()
    cur.execute("PRAGMA wal_autocheckpoint=0")
    cur.close()


class Service:
    """The whirlwatch service: one source, one :class:`Publisher`, one store.

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
    max_batch : int
        Most messages committed in one transaction.
    source : Source, optional
        Where readings come from (monitor/io/source.py). None: the broker of ``settings``
        (an MQTT :class:`MessageSource`), with status and alarms published there. A source
        given (a :class:`~monitor.io.source.StreamFileSource`, say) is read instead, and
        nothing is published.
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
        source: Source[Any] | None = None,
    ) -> None:
        if isinstance(max_batch, bool) or not isinstance(max_batch, int) or max_batch < 1:
            raise ValueError(f"max_batch must be a whole number of messages >= 1, got {max_batch!r}.")
        self.settings = settings
        self.limits = limits or IngestLimits()
        self.clock = clock or time.time
        self.stale_check_s = stale_check_s
        self.max_batch = max_batch
        self.mqtt = MqttSettings.from_settings(settings.broker, client_id=client_id)
        self.prefix = settings.broker.topic_prefix
        self.rejections = RejectionCounter(60.0)
        self.metrics = ServiceMetrics()
        self.store = Store.open(settings.database.url, busy_timeout_ms=settings.database.busy_timeout_ms,
                                silence_limit_s=SILENCE_LIMIT_S)
        self._sqlite = self.store.engine.dialect.name == "sqlite"
        if self._sqlite:
            # A WAL checkpoint copies and syncs the log into the database: 100-200 ms that
            # would otherwise land on whichever commit crosses the 1000-page mark, i.e. on
            # the worker. The periodic thread runs it instead (PASSIVE: it never blocks
            # the writer).
            event.listen(self.store.engine, "connect", _no_autocheckpoint)
            self.store.engine.dispose()
        registry, follower = load_registry_for(self.store, settings.service.machines_file)
        self._stop = threading.Event()
        self.core = Core(
            settings=settings, store=self.store,
            states=DetectorStates(registry, follower, self._now,
                                  postgres=self.store.engine.dialect.name == "postgresql"),
            board=StatusBoard((m.id for m in registry.machines), self._now),
            cadence=SnapshotCadence(settings.spectra.snapshot_interval_s),
            waveform_cadence=SnapshotCadence(settings.spectra.waveform_interval_s, waveforms=True),
            retrier=Retrier(self._stop, self.metrics), metrics=self.metrics, clock=self._now,
            lock=threading.RLock(), stop=self._stop,
        )
        self._health = Health(self.store, self.core.retrier, self._stop)
        start = read_start_state(self.store)
        # The status views carry on from the statuses last stored (and published).
        self.core.board.load(start.statuses)
        # The latest reading time committed here per stream (the replay check's reference).
        self._committed: dict[StreamKey, float] = dict(start.last_ts)
        known = registry.by_id()
        self.registry_changes = RegistryChanges(
            self.core, unsettled=[m for m in start.with_open_alarms if m in known],
            unretired=[m for m in start.unretired if m not in known])
        # Notifications: their own queues and threads, fed after each commit (announce).
        self.notifier: Notifier | None = None
        if settings.notifications.rules:
            self.notifier = Notifier(settings.notifications, self.store, self.metrics,
                                     lambda m: getattr(self.registry.by_id().get(m), "location", None))
            self.notifier.start()
        self._given_source = source
        self.source: Source[Any] | None = None
        self.publisher: Publisher | None = None
        self.metrics_server: MetricsServer | None = None
        self._prober: threading.Thread | None = None
        self._periodic: threading.Thread | None = None
        self._started = False

    def _now(self) -> float:
        return self.clock()

    @property
    def registry(self) -> Registry:
        """The registry as this process follows it."""
        return self.core.states.registry

    def detector(self, machine: str) -> MachineEvaluator:
        """The detector this process holds for ``machine``: its state in memory, which is
        behind the store's when another process moved it on since. For reading (tests,
        diagnostics); KeyError when the machine is not monitored."""
        return self.core.states.evaluator(machine)

    # -- messages

    def handle(self, topic: str, payload: bytes) -> Outcome:
        """Process one message up to the commit (no MQTT); see the module docstring."""
        return self.handle_batch([(topic, payload)])[0]

    def handle_batch(
        self, messages: Sequence[tuple[str, bytes]], redelivered: Sequence[bool] | None = None
    ) -> list[Outcome]:
        """Process messages up to one commit for all of them (no MQTT), in order.

        Decode and analyse each, then one transaction: one query finds the redeliveries,
        the detector states of the machines touched are taken once, every new reading is
        evaluated in arrival order, the rows go in with multi-row inserts and each
        machine's detector state is written once. Returns one :class:`Outcome` per
        message; a machine's status rides on the last of its outcomes that has one.
        ``redelivered``: one flag per message, set for a broker redelivery.
        """
        t0 = time.perf_counter()
        self.registry_changes.follow()
        items = decode_batch(
            messages, redelivered if redelivered is not None else [False] * len(messages),
            registry=self.registry, prefix=self.prefix, limits=self.limits, now=self.clock(),
            committed=self._committed, on_rejected=self._count_rejection)
        outcomes = commit_isolating(self.core, items)
        for it, out in zip(items, outcomes, strict=True):
            if not isinstance(it, RejectedMessage) and out.kind in (OutcomeKind.WAVEFORM, OutcomeKind.SPEED):
                self._committed[it.stream] = max(it.reading.ts, self._committed.get(it.stream, 0.0))
            self.metrics.messages_in.labels(kind=out.kind).inc()
        share = (time.perf_counter() - t0) / max(1, len(items))
        for _ in items:
            self.metrics.observe(share)
        self.metrics.batch_size.observe(len(items))
        return outcomes

    def _count_rejection(self, topic: str, rej: Rejected) -> None:
        self.metrics.rejected.labels(reason=rej.reason).inc()
        if self.rejections.record(rej.reason, time.monotonic()):
            log.warning(
                "message rejected",
                extra={"reason": rej.reason, "detail": rej.detail, "topic": topic[:200],
                       "suppressed_since_last": self.rejections.take_suppressed(rej.reason)},
            )

    def _on_batch(self, msgs: Sequence[Message]) -> None:
        """The source's handler: commit, acknowledge, then publish."""
        src = self.source
        assert src is not None
        self.metrics.in_flight.set(src.stats.in_flight)
        outs = self.handle_batch([(m.topic, m.payload) for m in msgs], [m.dup for m in msgs])
        self._health.committed()
        for m in msgs:
            src.ack(m)
        # Again after the acks, so an idle service does not show its last batch as in flight.
        self.metrics.in_flight.set(src.stats.in_flight)
        self.announce(outs)

    # -- changes made outside the readings (each returns the alarm events it published)

    def check_stale(self) -> list[dict[str, Any]]:
        """Raise stale-stream alarms as of the clock; publish them; return the events."""
        return self.announce(check_stale(self.core))

    def unshelve_expired(self) -> list[int]:
        """Record the ``unshelved`` transition of each alarm whose shelving time has passed
        (monitor/service/suppression.py); the alarm ids. Run every :data:`UNSHELVE_S`."""
        return unshelve_expired(self.core)

    def sync_acknowledgements(self) -> list[dict[str, Any]]:
        """Apply the acknowledgements made in the dashboard to the detectors now, not at
        the machines' next readings, and publish them (alarm events and retained status);
        run every :data:`~monitor.service.periodic.ACK_SYNC_S` by the periodic thread."""
        return self.announce(sync_acknowledgements(self.core))

    def apply_registry_requests(self) -> list[dict[str, Any]]:
        """Registry edits, live (the periodic thread runs this every 0.5 s; see
        monitor/service/registry_changes.py): alarms of what left a machine's entry, or of
        a retired machine, closed, recorded and published (a retired machine's retained
        status removed); pending baseline restarts applied."""
        return self.announce(self.registry_changes.settle())

    # -- outbound

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
            if self.settings.alarms.publish_status and out.kind == OutcomeKind.RETIRED:
                # An empty retained message removes the status (docs/mqtt.md).
                self.publisher.clear_status(out.machine, wait=False)
        except MqttError as exc:
            self.metrics.publish_failures.inc()
            log.warning("publishing failed", extra={"machine": out.machine, "error": str(exc)})

    def announce(self, outs: list[Outcome]) -> list[dict[str, Any]]:
        """Publish outcomes (after their commit), hand their alarm transitions to the
        notifier (its queues; never waiting: monitor/notify/dispatch.py), count and log
        them; returns their events."""
        for out in outs:
            self.publish(out)
            if self.notifier is not None and out.events:
                self.notifier.submit(out.events)
            for e in out.events:
                self.metrics.transitions.labels(transition=str(e.get("transition"))).inc()
                log.info("alarm transition", extra={
                    "machine": out.machine, "kind": e.get("kind"), "subject": e.get("subject"),
                    "transition": e.get("transition"), "severity": e.get("severity")})
        return [e for o in outs for e in o.events]

    # -- health

    def health(self) -> dict[str, Any]:
        """The health view (``/healthz``; monitor/service/health.py)."""
        return self._health.view(self.source, self.publisher, rejected=self.rejections.counts(),
                                 processing_errors=self.core.set_aside, machines=len(self.registry.machines))

    def readiness(self) -> dict[str, Any]:
        """The readiness view (``/readyz``): started, subscribed, the database answered
        its last probe, and healthy."""
        return self._health.readiness(self.health(), started=self._started, source=self.source)

    def probe_database(self) -> bool:
        """Ask the database a one-row question now; record the answer for health."""
        return self._health.probe_database()

    # -- start and stop

    def _jobs(self) -> list[PeriodicJob]:
        jobs = [PeriodicJob("registry edits and baseline restarts", 0.0, self.apply_registry_requests)]
        if self._sqlite:
            jobs.append(PeriodicJob("checkpoint", 0.0, lambda: checkpoint(self.store)))
        if self.stale_check_s > 0:
            jobs.append(PeriodicJob("stale streams", self.stale_check_s, self.check_stale))
        jobs.append(PeriodicJob("acknowledgements", ACK_SYNC_S, self.sync_acknowledgements))
        jobs.append(PeriodicJob("shelving ended", UNSHELVE_S, self.unshelve_expired))
        retention = self.settings.retention
        if retention.enabled:
            jobs.append(PeriodicJob("retention", retention.interval_s,
                                    lambda: apply_retention_now(self.store, retention.policy())))
        jobs.append(PeriodicJob("alarm gauges", GAUGES_S, lambda: refresh_alarm_gauges(self.store, self.metrics)))
        return jobs

    def _thread(self, target: Callable[[], None], name: str) -> threading.Thread:
        t = threading.Thread(target=target, name=name, daemon=True)
        t.start()
        return t

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
        self._prober = self._thread(self._health.probe_loop, "db-probe")
        self._thread(lambda: self._health.watch(self.health), "health-watch")
        source: Source[Any]
        if self._given_source is None:
            self.publisher = Publisher(self.mqtt)
            try:
                self.publisher.start(wait_s)
            except MqttError as exc:
                raise ServiceError(str(exc)) from exc
            source = MessageSource(self.mqtt)
        else:
            source = self._given_source
        self.source = source
        source.start_batches(self._on_batch, self.max_batch)
        if not source.wait_subscribed(wait_s):
            what = (f"no subscription at the broker {self.mqtt.shown_url}" if self._given_source is None
                    else "the source was not ready")
            raise ServiceError(
                f"{what} within {wait_s:g} s" + (f" ({source.last_error})." if source.last_error else ".")
            )
        self._periodic = self._thread(lambda: run_jobs(self._jobs(), self._stop), "periodic")
        self._started = True
        log.info("service started", extra={
            "broker": self.mqtt.shown_url, "client_id": self.mqtt.client_id,
            "shared_group": self.mqtt.share_group, "machines": len(self.registry.machines),
            "database": self.store.engine.url.render_as_string(hide_password=True)})

    def request_stop(self) -> None:
        """Ask the service to stop: units of work being retried give up at their next
        failure (their messages stay unacknowledged) and the periodic jobs end.
        :meth:`stop` does this first, then finishes and disconnects."""
        self._stop.set()

    def stop(self) -> None:
        """Stop taking messages, finish those handed off (commit, ack), disconnect."""
        self.request_stop()
        if self.source is not None:
            self.source.stop()
        if self.publisher is not None:
            self.publisher.stop()
        if self._periodic is not None:
            self._periodic.join(5.0)
        if self.notifier is not None:
            self.notifier.stop()
        if self._prober is not None:
            self._prober.join(1.0)  # a probe waiting on a silent database ends with its timeouts
        if self.metrics_server is not None:
            self.metrics_server.stop()
        self.core.states.follower.close()
        self.store.close()
        src = self.source
        get = self.metrics.registry.get_sample_value
        log.info("service stopped", extra={
            "received": src.stats.received if src else 0, "acked": src.stats.acked if src else 0,
            "batches": int(get("whirlwatch_batch_size_count") or 0),
            "db_retries": int(get("whirlwatch_db_retries_total") or 0),
            "batch_reruns": int(get("whirlwatch_batch_reruns_total") or 0),
        })

    def wait(self, timeout_s: float | None = None) -> bool:
        """True once the service is stopping (after up to ``timeout_s`` seconds)."""
        return self._stop.wait(timeout_s)
