"""The detectors this process holds, kept in step with the detector states in the store.

Each machine's detector (:class:`MachineEvaluator`) lives in memory between batches; its
state is also stored (``detector_state``, with a version that moves on by one per
transaction that writes it). A transaction that works on a machine first *takes* its
state (:meth:`DetectorStates.take`): the stored versions are read (row locks on
PostgreSQL, in machine order so two processes cannot deadlock) and a detector is reloaded
only when another process moved its state on; alarms of what the registry no longer holds
are closed, pending baseline restarts applied and acknowledgements made in the dashboard
applied. It ends by writing the states back (:meth:`DetectorStates.save`) and, after the
commit, noting the new versions (:meth:`DetectorStates.saved`); after a failed one the
detectors may be ahead of the store and are reloaded at their next use
(:meth:`DetectorStates.forget`).
"""

from __future__ import annotations

import datetime as dt
import logging
from collections.abc import Callable, Iterable, Mapping
from typing import Any, NamedTuple

from sqlalchemy import and_, bindparam, select
from sqlalchemy.orm import Session

from monitor.detection.alarms import Transition
from monitor.detection.evaluator import MachineEvaluator
from monitor.detection.stored_state import evaluator_from_state, stored_state
from monitor.model.registry import Registry
from monitor.service.passages import PassageTrackers
from monitor.service.registry_follow import RegistryChange, RegistryFollower, follow
from monitor.store import record_transitions
from monitor.store.models import Alarm, DetectorState
from monitor.store.passage_writes import save_passage_trackers
from monitor.store.reads import passage_tracker_state
from monitor.store.writes import save_detector_states

log = logging.getLogger("whirlwatch.service")

#: An alarm a detector holds as active: (machine, alarm ref).
AlarmRef = tuple[str, str]


class TakenStates(NamedTuple):
    """The detectors of the machines taken, and per machine the alarm transitions made
    outside the readings (alarms closed by a registry edit first, then acknowledgements),
    recorded already and still to publish."""

    evaluators: dict[str, MachineEvaluator]
    outside: dict[str, list[Transition]]


class DetectorStates:
    """One detector per machine of ``registry``, loaded from the store on first use.

    ``clock`` gives epoch seconds for the changes applied while taking a state (alarms
    closed, baselines restarted, an acknowledgement without its own time)."""

    def __init__(self, registry: Registry, follower: RegistryFollower, clock: Callable[[], float],
                 *, postgres: bool) -> None:
        self.registry = registry
        self.follower = follower
        self._clock = clock
        self._pg = postgres
        self._evaluators: dict[str, MachineEvaluator] = {m.id: MachineEvaluator(m) for m in registry.machines}
        # The stored version each detector matches; None: load it from the store first.
        self._versions: dict[str, int | None] = {m.id: None for m in registry.machines}
        # Each machine's live passage trackers: loaded, written and reloaded with its
        # detector (monitor/service/passages.py).
        self._passages: dict[str, PassageTrackers] = {}
        # Statements of the hot path, built once (building costs about what running them does).
        self._versions_stmt: Any = None
        self._acks_stmt: Any = None

    def evaluator(self, machine: str) -> MachineEvaluator:
        """The detector of ``machine`` as held in memory (KeyError if not monitored)."""
        return self._evaluators[machine]

    def passages(self, machine: str) -> PassageTrackers:
        """The passage trackers of ``machine`` as held in memory (taken with its detector)."""
        return self._passages.setdefault(machine, PassageTrackers())

    # -- registry changes

    def follow(self, change: RegistryChange) -> None:
        """The registry after ``change``: changed machines' detectors rebuilt on their new
        entries (state kept), retired ones dropped, new ones loaded on first use
        (monitor/service/registry_follow.py, :func:`follow`)."""
        self.registry, self._evaluators = follow(self.registry, self._evaluators, change)
        known = self.registry.by_id()
        for mid in change.machines:
            if mid not in known:
                self._versions.pop(mid, None)
                self._passages.pop(mid, None)
        for m in self.registry.machines:
            if m.id not in self._evaluators:
                self._versions[m.id] = None  # loaded from the store on first use

    # -- taking and writing states

    def take(self, s: Session, machines: list[str], *, acks: bool = True) -> TakenStates:
        """Lock (PostgreSQL) and check the stored state versions of ``machines``,
        reloading a detector only when another process moved its state on; close and
        record the alarms of what the registry no longer holds; apply pending baseline
        restarts; and apply the acknowledgements made in the dashboard (stored there
        already), unless ``acks`` is false. The caller writes the states of machines with
        transitions made outside the readings.

        One query: the state rows joined to the machines' acknowledged alarms (the alarms
        still open and acknowledged: a few at most; only the detector-state rows are locked)."""
        if not machines:
            return TakenStates({}, {})
        rows = s.connection().execute(self._versions_statement(), {"machines": machines}).all()
        stored = {m: int(v or 0) for m, v, *_ in rows}
        for machine in machines:
            v = stored.get(machine, 0)
            if self._versions.get(machine) != v:
                self._reload(s, machine, v)
        evaluators = {m: self._evaluators[m] for m in machines}
        out = self._close_orphans(s, evaluators)
        self.follower.apply_baseline_restarts(s, evaluators, self._versions, self._clock())
        active = _active_alarms(evaluators)
        if not (acks and active):
            return TakenStates(evaluators, out)
        if any(m not in stored for m, _ in active):
            # Open alarms but no stored state row (removed by hand): the join cannot see
            # their acknowledgements, so ask the alarms alone.
            for m, trans in self._apply_acks(s, evaluators).items():
                out.setdefault(m, []).extend(trans)
            return TakenStates(evaluators, out)
        for machine, _v, ref, user, at, comment in rows:
            ev = active.pop((machine, ref), None) if ref is not None else None
            if ev is None:
                continue
            when = at.timestamp() if at is not None else self._clock()
            out.setdefault(machine, []).append(ev.acknowledge(ref, user or "unknown", comment or "", when))
        return TakenStates(evaluators, out)

    def save(self, s: Any, touched: Mapping[str, float | dt.datetime | None]) -> None:
        """Write the new state of every machine in ``touched`` (``{machine: latest reading
        time}``), one row each, its version moved on by one, and its passage trackers'
        (``s``: a session or its connection)."""
        save_detector_states(s, {
            m: (stored_state(self._evaluators[m], (self._versions.get(m) or 0) + 1), ts)
            for m, ts in touched.items()
        })
        save_passage_trackers(s, {m: self._passages[m].snapshot() for m in touched if m in self._passages})

    def saved(self, machines: Iterable[str]) -> None:
        """After the commit: the held versions match what :meth:`save` wrote."""
        for m in machines:
            self._versions[m] = (self._versions.get(m) or 0) + 1

    def forget(self, machines: Iterable[str]) -> None:
        """After a failed transaction the detectors may be ahead of the store: reloaded
        at their next use."""
        for m in machines:
            self._versions[m] = None

    def _reload(self, s: Session, machine: str, version: int) -> None:
        state = s.execute(
            select(DetectorState.state).where(DetectorState.machine_id == machine)
        ).scalar_one_or_none()
        spec = self.registry.machine(machine)
        self._evaluators[machine] = evaluator_from_state(spec, state)[0]
        self._passages[machine] = PassageTrackers.restore(spec, passage_tracker_state(s, machine))
        self._versions[machine] = version

    def _versions_statement(self) -> Any:
        if self._versions_stmt is None:
            d, a = DetectorState.__table__.c, Alarm.__table__.c
            stmt = (
                select(d.machine_id, d.state["version"].as_integer(), a.ref,
                       a.acknowledged_by, a.acknowledged_at, a.ack_comment)
                .select_from(DetectorState.__table__.outerjoin(
                    Alarm.__table__, and_(a.machine_id == d.machine_id, a.state == "acknowledged")))
                .where(d.machine_id.in_(bindparam("machines", expanding=True)))
                .order_by(d.machine_id, a.id)
            )
            self._versions_stmt = stmt.with_for_update(of=DetectorState.__table__) if self._pg else stmt
        return self._versions_stmt

    def _close_orphans(self, s: Session, evaluators: dict[str, MachineEvaluator]) -> dict[str, list[Transition]]:
        """Alarms of modes, points and excitations taken out of the registry since the
        detectors' state was written, closed now
        (:meth:`MachineEvaluator.close_orphaned_alarms`) and recorded in this transaction,
        per machine. Only a detector restored since its last check has any to close."""
        out: dict[str, list[Transition]] = {}
        now: float | None = None
        for machine, ev in evaluators.items():
            if now is None:
                now = self._clock()
            trans = ev.close_orphaned_alarms(now)
            if trans:
                record_transitions(s, trans)
                out[machine] = trans
                log.info("alarms closed: no longer in the registry", extra={
                    "machine": machine, "alarms": [t.alarm_id for t in trans]})
        return out

    # -- acknowledgements made in the dashboard

    def active_alarms(self) -> set[AlarmRef]:
        """Every alarm a detector holds as active (not yet acknowledged)."""
        return set(_active_alarms(self._evaluators))

    def acknowledged(self, s: Session, alarms: set[AlarmRef]) -> list[tuple[Any, ...]]:
        """The rows (machine, ref, user, time, comment) of ``alarms`` acknowledged in the
        store, oldest first. One query."""
        return list(s.execute(self._acks_statement(), {
            "machines": sorted({m for m, _ in alarms}), "refs": sorted({r for _, r in alarms})}).all())

    def _apply_acks(self, s: Session, evaluators: dict[str, MachineEvaluator]) -> dict[str, list[Transition]]:
        """Acknowledgements made in the dashboard, applied to the detectors (and returned
        per machine for publishing; the dashboard has stored them already). One query."""
        active = _active_alarms(evaluators)
        if not active:
            return {}
        out: dict[str, list[Transition]] = {}
        for machine, ref, user, at, comment in self.acknowledged(s, set(active)):
            ev = active.pop((machine, ref), None)
            if ev is None:
                continue
            when = at.timestamp() if at is not None else self._clock()
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


def _active_alarms(evaluators: Mapping[str, MachineEvaluator]) -> dict[AlarmRef, MachineEvaluator]:
    return {(m, a.id): ev for m, ev in evaluators.items() for a in ev.engine.active() if a.state == "active"}
