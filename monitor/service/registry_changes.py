"""Registry edits made while the service runs, settled: alarms of what left the registry
closed, retired machines' alarms closed and their status removed.

Every batch, and the periodic thread every 0.5 s, follows the registry
(:meth:`RegistryChanges.follow`; monitor/service/registry_follow.py reads the changes). A
machine whose entry changed is queued to close the alarms of what the entry no longer
holds; a retired one to be retired. :meth:`RegistryChanges.settle` does both, and applies
the baseline restarts of machines no batch has touched since they were asked for
(docs/alarms.md, "Alarms of what leaves the registry"). What changed while the service was
stopped is settled at its first pass.
"""

from __future__ import annotations

import logging
from collections.abc import Iterable
from functools import partial

from sqlalchemy import select

from monitor.detection.stored_state import retire_state
from monitor.service.core import Core
from monitor.service.failures import is_transient, short_cause
from monitor.service.items import Outcome, OutcomeKind
from monitor.service.payloads import alarm_events, retained_statuses
from monitor.store import record_transitions
from monitor.store.models import DetectorState
from monitor.store.models import Machine as MachineRow
from monitor.store.statuses import drop_statuses
from monitor.store.writes import save_detector_states

log = logging.getLogger("whirlwatch.service")


class RegistryChanges:
    """The registry changes still to settle: ``unsettled`` machines whose entry changed
    (alarms of what it no longer holds to close), ``unretired`` machines retired from the
    registry whose alarms and status nobody has closed yet."""

    def __init__(self, core: Core, unsettled: Iterable[str] = (), unretired: Iterable[str] = ()) -> None:
        self.core = core
        self._unsettled = set(unsettled)
        self._unretired = set(unretired)

    def follow(self) -> None:
        """Registry edits made since the last look, live: the detectors follow them and
        the machines they touched are queued for :meth:`settle` (the next batch touching
        a changed machine closes its orphaned alarms first, if it comes sooner)."""
        core = self.core
        with core.lock:  # the worker and the periodic thread both follow
            change = core.states.follower.poll()
            if change is None:
                return
            before = core.states.registry.by_id()
            core.states.follow(change)
            after = core.states.registry.by_id()
            for mid in change.machines:
                machine = after.get(mid)
                if machine is None:
                    if mid in before:
                        self._unretired.add(mid)
                        core.board.drop(mid)
                        core.latest.forget(mid)
                    continue
                if before.get(mid) != machine:
                    self._unsettled.add(mid)
                    core.board.keep_points(mid, [p.id for p in machine.points])
                    core.latest.keep_points(mid, [p.id for p in machine.points])
            for m in core.states.registry.machines:
                core.board.ensure(m.id)

    def settle(self) -> list[Outcome]:
        """Follow the registry, then close, record and return (for publishing) the alarms
        of modes, points and excitations taken out of machines' entries; retire the
        machines retired (:meth:`_retire`); apply the baseline restarts still pending."""
        self.follow()
        core = self.core
        known = core.states.registry.by_id()
        with core.lock:
            self._unsettled.intersection_update(known)
            settle = sorted(self._unsettled)
            retire = sorted(self._unretired - set(known))
        machines = sorted({*settle, *(m for m in core.states.follower.pending_machines() if m in known)})
        outs: list[Outcome] = []
        if machines:
            def work() -> list[Outcome]:
                with core.transaction() as s:
                    evaluators, closed = core.states.take(s, machines, acks=False)
                    if not closed:
                        return []
                    # Written with the closings, keeping each row's reading time.
                    kept = dict(s.execute(select(DetectorState.machine_id, DetectorState.ts)
                                          .where(DetectorState.machine_id.in_(sorted(closed)))).all())
                    core.states.save(s, {m: kept.get(m) for m in closed})
                    bodies = retained_statuses(s, core.board, {m: evaluators[m] for m in closed})
                    done = [Outcome(OutcomeKind.REGISTRY, machine=m, events=alarm_events(s, [], [], trans),
                                    status=bodies[m]) for m, trans in closed.items()]
                core.states.saved(closed)
                return done

            outs += core.retry(work, machines)
            with core.lock:
                self._unsettled.difference_update(settle)
        for mid in retire:
            try:
                out = core.retry(partial(self._retire, mid), [mid])
            except Exception as exc:
                if is_transient(exc) or core.stop.is_set():
                    raise
                out = None  # the state cannot be read: said once, not retried for ever
                log.error("could not close the alarms of a retired machine", extra={
                    "machine": mid, "error": short_cause(exc)})
            with core.lock:
                self._unretired.discard(mid)
            if out is not None:
                outs.append(out)
        return outs

    def _retire(self, machine: str) -> Outcome | None:
        """Close the alarms of a machine retired from the registry
        (:func:`monitor.detection.stored_state.retire_state`), record them and write its state
        marked retired, in one transaction; the outcome carries their events and removes
        the machine's retained status when published. None when there is nothing to do:
        the machine is active again, was never monitored (no state), or another process
        (or an earlier run) retired it already."""
        core = self.core
        with core.transaction() as s:
            stmt = (select(DetectorState.state, DetectorState.ts)
                    .join(MachineRow, MachineRow.id == DetectorState.machine_id)
                    .where(DetectorState.machine_id == machine, MachineRow.active.is_(False)))
            if core.postgres:
                stmt = stmt.with_for_update(of=DetectorState)
            row = s.execute(stmt).one_or_none()
            if row is None or (isinstance(row.state, dict) and row.state.get("retired")):
                return None
            state, trans = retire_state(row.state, core.clock())
            ids = record_transitions(s, trans) if trans else []
            save_detector_states(s, {machine: (state, row.ts)})
            drop_statuses(s, [machine])  # as its retained status is removed
            out = Outcome(OutcomeKind.RETIRED, machine=machine, events=alarm_events(s, trans, ids, []))
        log.info("machine retired: alarms closed, status removed", extra={
            "machine": machine, "alarms": [t.alarm_id for t in trans]})
        return out
