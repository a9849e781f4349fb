"""The service's periodic jobs, run on one thread beside the batches.

Every 0.5 s (:func:`run_jobs`): registry edits and baseline restarts
(monitor/service/registry_changes.py) and, on SQLite, a passive WAL checkpoint; less
often: stale streams (:func:`check_stale`; not of points out of service), shelvings
whose time has passed (monitor/service/suppression.py), acknowledgements made in the dashboard
(:func:`sync_acknowledgements`, every :data:`ACK_SYNC_S`), retention (its own interval),
and the alarm gauges of the metrics. A failing job is logged (once per
``LOG_REPEAT_S`` per job) and never ends the loop.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

from sqlalchemy.orm import Session

from monitor.detection.evaluator import MachineEvaluator
from monitor.metrics import ServiceMetrics
from monitor.service.core import Core
from monitor.service.failures import short_cause
from monitor.service.items import Outcome, OutcomeKind
from monitor.service.logs import RepeatGate
from monitor.service.payloads import alarm_events, retained_statuses
from monitor.service.stops import apply_announced_stops
from monitor.service.suppression import planned_work
from monitor.store import Store, apply_retention, reads, record_transitions
from monitor.store.retention import RetentionPolicy

log = logging.getLogger("whirlwatch.service")

#: How often the loop looks for due jobs, s.
TICK_S = 0.5
#: Acknowledgements made in the dashboard are looked for this often, s.
ACK_SYNC_S = 1.0
#: The alarm gauges of the metrics are refreshed this often, s.
GAUGES_S = 5.0
#: Retention's deletes may take this long before their connection is closed, s (the
#: service's other statements get store/db.py's silence limit).
RETENTION_SILENCE_LIMIT_S = 900.0


@dataclass(frozen=True)
class PeriodicJob:
    """A job of the periodic loop: ``run`` every ``every_s`` seconds (0: every tick)."""

    name: str
    every_s: float
    run: Callable[[], Any]


def run_jobs(jobs: Sequence[PeriodicJob], stop: threading.Event) -> None:
    """Run each job when due, in order, every :data:`TICK_S` until ``stop`` is set; the
    first run of a job with an interval comes one interval after the start."""
    start = time.monotonic()
    last = {job.name: start for job in jobs}
    failures = RepeatGate()
    while not stop.wait(TICK_S):
        now_m = time.monotonic()
        for job in jobs:
            if now_m - last[job.name] < job.every_s:
                continue
            last[job.name] = now_m
            try:
                job.run()
            except Exception as exc:
                if failures.due(job.name):
                    log.warning("periodic job failed", extra={"job": job.name, "error": short_cause(exc)})


def check_stale(core: Core) -> list[Outcome]:
    """Raise stale-stream alarms as of the clock, machine by machine; the outcomes to
    publish."""
    now = core.clock()
    outs: list[Outcome] = []
    for m in core.states.registry.machines:
        def work(mid: str = m.id) -> Outcome | None:
            with core.transaction() as s:
                evs, outside = core.states.take(s, [mid], acks=False)
                ev, closed = evs[mid], outside.get(mid, [])
                apply_announced_stops(s, evs, now)
                trans = ev.check_stale(now, out_of_service_points(s, ev, now))
                if not (trans or closed):
                    return None
                ids = record_transitions(s, trans) if trans else []
                core.states.save(s, {mid: now})
                out = Outcome(OutcomeKind.STALE, machine=mid, events=alarm_events(s, trans, ids, closed),
                              status=retained_statuses(s, core.board, {mid: ev})[mid])
            core.states.saved([mid])
            return out

        o = core.retry(work, [m.id])
        if o is not None:
            outs.append(o)
    return outs


def out_of_service_points(s: Session, ev: MachineEvaluator, now: float) -> frozenset[str]:
    """The points of ``ev``'s machine out of service at ``now`` (epoch s): no stale-stream
    alarm for planned work (monitor/service/suppression.py)."""
    m = ev.machine
    return planned_work(s, [m.id], now).points_of(m.id, [p.id for p in m.points])


def machines_to_sync(core: Core) -> list[str]:
    """Machines with a change made outside the readings that their detector has not
    applied yet: an alarm acknowledged in the dashboard that the detector still holds as
    active. One query, and only while some detector holds an active alarm."""
    with core.lock:
        active = core.states.active_alarms()
    if not active:
        return []
    with core.store.session() as s:
        rows = core.states.acknowledged(s, active)
    return sorted({m for m, ref, *_ in rows if (m, ref) in active})


def sync_acknowledgements(core: Core) -> list[Outcome]:
    """Apply the acknowledgements made in the dashboard to the detectors now, not at the
    machines' next readings; the outcomes (alarm events, retained status) to publish."""
    outs: list[Outcome] = []
    for machine in machines_to_sync(core):
        def work(mid: str = machine) -> Outcome | None:
            with core.transaction() as s:
                evaluators, acks = core.states.take(s, [mid])
                mine = acks.get(mid, [])
                if not mine:
                    return None  # another process applied them (its copy was newer)
                core.states.save(s, {mid: core.clock()})
                out = Outcome(OutcomeKind.ACKNOWLEDGED, machine=mid, events=alarm_events(s, [], [], mine),
                              status=retained_statuses(s, core.board, {mid: evaluators[mid]})[mid])
            core.states.saved([mid])
            return out

        o = core.retry(work, [machine])
        if o is not None:
            outs.append(o)
    return outs


def checkpoint(store: Store) -> None:
    """A passive WAL checkpoint of a SQLite store (it never blocks the writer)."""
    with store.engine.connect() as c:
        c.exec_driver_sql("PRAGMA wal_checkpoint(PASSIVE)")


def apply_retention_now(store: Store, policy: RetentionPolicy) -> None:
    """Delete what the retention policy no longer keeps (docs/configuration.md)."""
    with store.transaction() as s:
        s.connection(execution_options={"silence_limit_s": RETENTION_SILENCE_LIMIT_S})
        res = apply_retention(s, policy)
    log.info("retention applied", extra={"result": str(res)})


def refresh_alarm_gauges(store: Store, metrics: ServiceMetrics) -> None:
    """The alarms in the store by state, for the metrics."""
    with store.session() as s:
        metrics.set_alarm_states(reads.alarm_counts_by_state(s))
