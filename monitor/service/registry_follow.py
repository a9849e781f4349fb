"""The running service's registry, kept in step with the database's.

Engineers edit the registry while the service runs (modes through the dashboard or the
API, an import, a baseline restart after maintenance). Every such write moves the
registry version on (monitor/store/registry_sync.py). Once per batch the service asks for
that version (:meth:`RegistryFollower.poll`, one one-row query); when it moved, it reads
the machines written since and rebuilds their evaluators from the stored registry while
keeping their detector state (:func:`follow`). Baseline restart requests are applied in
the transaction of the next batch (or periodic pass) that holds the machine's detector
state (:meth:`RegistryFollower.apply_baseline_restarts`), and marked applied there.

At start (:func:`start_registry`) a registry file (``service.machines_file``) adds and
updates the machines whose file entry changed since it was last imported; nothing is
deleted, and edits made elsewhere stay.
"""

from __future__ import annotations

import logging
import weakref
from collections.abc import Mapping, MutableMapping
from dataclasses import dataclass
from typing import Any

from sqlalchemy import select

from monitor.detection.evaluator import MachineEvaluator
from monitor.detection.stored_state import stored_state
from monitor.model.registry import Machine, Registry
from monitor.model.registry_file import load_registry, registry_warnings
from monitor.store import Store
from monitor.store.models import DetectorState, utcnow
from monitor.store.registry_sync import (
    VERSION_SQL,
    changed_machines,
    import_registry,
    mark_baseline_restart_applied,
    pending_baseline_restarts,
    read_registry,
    registry_version,
)
from monitor.store.writes import save_detector_states

log = logging.getLogger("whirlwatch.registry")


@dataclass(frozen=True)
class PendingRestart:
    """A baseline restart request not applied yet (``point`` None: every point)."""

    id: int
    machine: str
    point: str | None
    requested_by: str


@dataclass(frozen=True)
class RegistryChange:
    """Machines written since the version a service held: each id with its entry, or None
    when retired or unusable (its readings are then rejected as an unknown machine)."""

    version: int
    machines: Mapping[str, Machine | None]


def follow(registry: Registry, evaluators: Mapping[str, MachineEvaluator], change: RegistryChange
           ) -> tuple[Registry, dict[str, MachineEvaluator]]:
    """The registry and evaluators after ``change``: a changed machine's evaluator is
    rebuilt on its new entry from its own state (baselines, trends, alarms kept); a new
    machine has no evaluator yet (the service loads it from the store on first use); a
    retired one is dropped.

    An alarm of a mode, point or excitation the new entry no longer holds stays open in
    the rebuilt evaluator until the service takes its state in a transaction, where
    :meth:`MachineEvaluator.close_orphaned_alarms` closes it and the transition is
    recorded and published; a retired machine's stored alarms are closed by the service
    (:func:`monitor.detection.stored_state.retire_state`). docs/alarms.md, "Alarms of what leaves the
    registry"."""
    machines = dict(registry.by_id())
    out = dict(evaluators)
    for mid, machine in change.machines.items():
        if machine is None:
            if machines.pop(mid, None) is not None:
                log.warning("machine no longer monitored", extra={"machine": mid})
            out.pop(mid, None)
            continue
        if machines.get(mid) == machine:
            continue
        machines[mid] = machine
        old = out.pop(mid, None)
        if old is not None:
            out[mid] = MachineEvaluator.restore(machine, old.snapshot())
        log.info("registry entry reloaded", extra={"machine": mid, "version": change.version})
    order = [m.id for m in registry.machines if m.id in machines]
    order += [mid for mid in change.machines if mid in machines and mid not in order]
    return Registry(machines=tuple(machines[mid] for mid in order)), out


class RegistryFollower:
    """The registry version a service holds, and the baseline restarts waiting for it."""

    def __init__(self, store: Store, version: int, pending: list[PendingRestart]) -> None:
        self.store = store
        self.version = version
        self._pending: dict[str, list[PendingRestart]] = {}
        self._set_pending(pending)
        self._failing = False
        self._conn: Any = None  # the driver's connection the version is read on

    def _read_version(self) -> int:
        """The registry version, read on a connection of its own kept open, in autocommit:
        one round trip (2 us on SQLite, about 40 us on PostgreSQL over loopback, measured),
        where a pooled connection costs three (the pool's ping, the query, the reset)."""
        if self._conn is None:
            raw = self.store.engine.raw_connection()
            raw.detach()  # never handed back to the pool: its autocommit stays with it
            conn: Any = raw.dbapi_connection  # set while checked out
            if self.store.engine.dialect.name == "postgresql":
                # The checkout's liveness ping may have opened a transaction; autocommit
                # can only be set outside one.
                conn.rollback()
                conn.autocommit = True
            self._conn = conn
            # Closed with this follower (or at exit), never left to the garbage collector.
            self._closer = weakref.finalize(self, raw.close)
        try:
            row = self._conn.execute(VERSION_SQL).fetchone()
        except Exception:
            self.close()
            raise
        return int(row[0] or 0) if row else 0

    def close(self) -> None:
        """Close the version connection (it is opened again when needed)."""
        if self._conn is not None:
            self._conn = None
            self._closer()

    def _set_pending(self, pending: list[PendingRestart]) -> None:
        grouped: dict[str, list[PendingRestart]] = {}
        for p in pending:
            grouped.setdefault(p.machine, []).append(p)
        self._pending = grouped

    def pending_machines(self) -> list[str]:
        """Machines with a baseline restart not yet known to be applied."""
        return sorted(self._pending)

    def poll(self) -> RegistryChange | None:
        """One one-row query: None while the registry version is the one held; else the
        machines written since (and the pending baseline restarts are read again). A
        database error is logged once and counts as no change: the batch's own
        transaction meets it and retries."""
        try:
            version = self._read_version()
            if version == self.version:
                self._recovered()
                return None
            with self.store.session() as s:
                # A version below the one held (a restored database): read everything.
                since = self.version if version > self.version else -1
                machines, problems = changed_machines(s, since)
                pending = _pending(s)
        except Exception as exc:  # the batch's transaction meets the same fault and retries
            if not self._failing:
                self._failing = True
                log.warning("registry version check failed", extra={"error": str(exc)[:300]})
            return None
        self._recovered()
        for p in problems:
            log.warning("registry entry left out", extra={"problem": p})
        self.version = version
        self._set_pending(pending)
        return RegistryChange(version, machines)

    def _recovered(self) -> None:
        if self._failing:
            self._failing = False
            log.info("registry version check works again")

    def apply_baseline_restarts(self, session: Any, evaluators: Mapping[str, MachineEvaluator],
                                versions: MutableMapping[str, int | None], now: float) -> list[int]:
        """Apply the pending baseline restarts of ``evaluators``' machines inside the
        caller's transaction, which holds their detector state at the stored ``versions``:
        each request is marked applied (unless another process did), its points' baselines
        and trends are learned again from ``now`` (epoch s) on, and the state is written
        back with its version moved on, so a transaction that writes nothing more still
        keeps the restart. Returns the ids applied here.

        A request stays in the pending list until a transaction finds it applied: if this
        one rolls back, the retry applies it again to the state it reloads."""
        applied: list[int] = []
        for machine in [m for m in evaluators if m in self._pending]:
            ev = evaluators[machine]
            done_here = False
            for req in list(self._pending[machine]):
                if not mark_baseline_restart_applied(session, req.id, utcnow()):
                    self._pending[machine].remove(req)  # applied and committed already
                    continue
                points = [req.point] if req.point is not None else [p.id for p in ev.machine.points]
                for pid in points:
                    try:
                        ev.restart_baseline(pid, now)
                    except KeyError:
                        log.warning("baseline restart names a point no longer monitored",
                                    extra={"machine": machine, "point": pid, "request": req.id})
                log.info("baseline restarted", extra={"machine": machine, "point": req.point,
                                                      "request": req.id, "by": req.requested_by})
                applied.append(req.id)
                done_here = True
            if not self._pending[machine]:
                del self._pending[machine]
            if done_here:
                # Through the store's one detector-state write, keeping the row's reading time.
                row = session.execute(select(DetectorState.ts).where(DetectorState.machine_id == machine)
                                      ).one_or_none()
                if row is not None:  # no row: nothing learned yet, nothing to keep
                    save_detector_states(session, {
                        machine: (stored_state(ev, (versions.get(machine) or 0) + 1), row.ts)})
        return applied


def _pending(session: Any) -> list[PendingRestart]:
    return [PendingRestart(r.id, r.machine_id, r.point_id, r.requested_by)
            for r in pending_baseline_restarts(session)]


def start_registry(store: Store, machines_file: str | None) -> tuple[Registry, RegistryFollower]:
    """The registry a service starts with, and its follower. With ``machines_file`` the
    file's entries that changed since they were last imported are added and updated
    first (nothing is deleted); ValueError (RegistryError) naming the file on a bad one."""
    if machines_file:
        from_file = load_registry(machines_file)
        for w in registry_warnings(from_file):
            log.warning("registry file key kept but not read", extra={"file": machines_file, "detail": w})
        with store.transaction() as s:
            report = import_registry(s, from_file, user="service start", changed_only=True)
        if report.changed:
            log.info("registry file applied", extra={"file": machines_file, "summary": report.summary()})
        for line in report.details():
            log.info("registry file import", extra={"file": machines_file, "detail": line})
    with store.session() as s:
        # The version first: a write after it is read again at the first batch.
        version = registry_version(s)
        registry, problems = read_registry(s)
        pending = _pending(s)
    for p in problems:
        log.warning("registry entry left out", extra={"problem": p})
    return registry, RegistryFollower(store, version, pending)
