"""The machine registry in the database: import from its TOML file, export, edits, reads.

Once imported, the database is the registry's source of truth. An import adds and
updates what the file names and keeps what it leaves out (machines, points and modes
engineers created elsewhere, e.g. through the dashboard); only ``replace=True`` removes
what the file leaves out: machines and points are retired (``active = False``, their
history stays), modes deleted. Every mode change writes a ``mode_history`` row (who, when,
old and new values).

Every transaction that writes the registry moves the registry version on by one
(:func:`touch_registry`, table ``registry_state``) and stamps it on the machines it
touched, so a running service sees an edit at its next batch and reloads just those
machines (monitor/service/registry_follow.py).

Readers never fail on a stored value an older release let in: :func:`read_machine`
checks every machine, point and mode against the registry's bounds
(:func:`monitor.model.bounds.check_machine`) and leaves out what fails, saying why.
"""

from __future__ import annotations

import datetime as dt
import hashlib
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any, cast

from sqlalchemy import CursorResult, func, select, update
from sqlalchemy.orm import Session, selectinload

from monitor.model.bounds import check_machine, check_mode, check_point
from monitor.model.jsonsafe import jsonable
from monitor.model.registry import Machine, Mode, Point, Registry, RegistryError
from monitor.model.registry_file import dump_registry
from monitor.store.models import (
    BaselineRestart,
    MeasurementPoint,
    ModeHistory,
    RegistryState,
    utcnow,
)
from monitor.store.models import Machine as MachineRow
from monitor.store.models import Mode as ModeRow
from monitor.store.statuses import drop_statuses, ensure_statuses


class UnknownEntry(LookupError):
    """No such (active) machine or point; the message names it."""

    def __str__(self) -> str:  # LookupError would show the message quoted
        return str(self.args[0]) if self.args else ""


# ----------------------------------------------------------------------------- version


def touch_registry(session: Session, machines: Iterable[MachineRow] = ()) -> int:
    """Move the registry version on by one and stamp it on ``machines``; returns it.

    Call it first in a registry write: on PostgreSQL the version row stays locked until
    the commit, so concurrent registry writes queue in one order and a reader that sees a
    version also sees every write stamped with it or below."""
    version = session.execute(
        update(RegistryState).where(RegistryState.id == 1)
        .values(version=RegistryState.version + 1, updated_at=utcnow())
        .returning(RegistryState.version)
    ).scalar()
    if version is None:  # a schema made without the migration's first row
        version = 1
        session.add(RegistryState(id=1, version=version, updated_at=utcnow()))
        session.flush()
    for row in machines:
        row.registry_version = version
    return int(version)


def registry_version(session: Session) -> int:
    """The registry version (0 before the first write)."""
    return int(session.scalar(select(func.coalesce(func.max(RegistryState.version), 0))) or 0)


#: The one-row query a running service makes once per batch (plain SQL for the driver's
#: own connection: registry_live.RegistryFollower).
VERSION_SQL = "SELECT version FROM registry_state WHERE id = 1"


# ----------------------------------------------------------------------------- import


@dataclass
class ImportReport:
    """What an import changed, kept and removed (machines by id; points and modes as
    'machine/name')."""

    machines_added: list[str] = field(default_factory=list)
    machines_updated: list[str] = field(default_factory=list)
    machines_unchanged: list[str] = field(default_factory=list)
    machines_retired: list[str] = field(default_factory=list)
    machines_kept: list[str] = field(default_factory=list)
    points_retired: list[str] = field(default_factory=list)
    points_kept: list[str] = field(default_factory=list)
    modes_changed: list[str] = field(default_factory=list)
    modes_deleted: list[str] = field(default_factory=list)
    modes_kept: list[str] = field(default_factory=list)
    #: Machines an import with ``replace`` left with no modes or no points.
    emptied: list[str] = field(default_factory=list)

    def summary(self) -> str:
        return (
            f"{len(self.machines_added)} machines added, {len(self.machines_updated)} updated, "
            f"{len(self.machines_retired)} retired, {len(self.modes_changed)} mode changes, "
            f"{len(self.modes_deleted)} modes deleted, {len(self.points_retired)} points retired"
        )

    def details(self) -> list[str]:
        """One sentence per kind of removal, and per kind of entry kept because the file
        left it out (what ``replace`` would remove)."""
        out = []
        for items, what in ((self.machines_retired, "machines retired"),
                            (self.points_retired, "points retired"),
                            (self.modes_deleted, "modes deleted")):
            if items:
                out.append(f"{what}: {_listed(items)}.")
        out += self.emptied
        kept = ([f"machine {m}" for m in self.machines_kept] + [f"point {p}" for p in self.points_kept]
                + [f"mode {m}" for m in self.modes_kept])
        if kept:
            out.append(f"kept, though the file leaves them out: {_listed(kept)}; "
                       "`machines import --replace` would remove them.")
        return out

    @property
    def changed(self) -> bool:
        return bool(self.machines_added or self.machines_updated or self.machines_retired
                    or self.points_retired or self.modes_changed or self.modes_deleted)


def _listed(items: Sequence[str], most: int = 50) -> str:
    shown = ", ".join(items[:most])
    return shown if len(items) <= most else f"{shown} and {len(items) - most} more"


def _mode_values(mode: Mode) -> dict[str, Any]:
    return {
        "name": mode.name,
        "frequency_hz": mode.frequency_hz,
        "damping_ratio": mode.damping_ratio,
        "amplification_factor": mode.amplification_factor,
        "required_margin_pct": mode.required_margin_pct,
        "source": mode.source,
        "date": mode.date.isoformat() if mode.date else None,
    }


def _machine_values(m: Machine) -> dict[str, Any]:
    return {
        "name": m.name,
        "location": m.location,
        "machine_class": m.machine_class,
        "speed_min_rpm": m.speed_range_rpm[0],
        "speed_max_rpm": m.speed_range_rpm[1],
        "excitation_orders": list(m.excitation_orders),
        "line_frequency_hz": m.line_frequency_hz,
        "limits_mm_s": list(m.limits_mm_s) if m.limits_mm_s else None,
        "settings": jsonable(dict(m.settings)),
        "active": True,
    }


def _point_values(p: Point) -> dict[str, Any]:
    return {
        "direction": p.direction,
        "quantity": p.quantity,
        "unit": p.unit,
        "fs_hz": p.fs_hz,
        "limits_mm_s": list(p.limits_mm_s) if p.limits_mm_s else None,
        "active": True,
    }


def _assign(row: Any, values: dict[str, Any]) -> bool:
    changed = False
    for k, v in values.items():
        if getattr(row, k) != v:
            setattr(row, k, v)
            changed = True
    return changed


def entry_digest(machine: Machine) -> str:
    """sha256 (hex) of a machine's registry entry as the file would hold it."""
    return hashlib.sha256(dump_registry(Registry(machines=(machine,))).encode()).hexdigest()


def record_mode_change(
    session: Session,
    machine_id: str,
    mode_name: str,
    change: str,
    user: str,
    old: dict[str, Any] | None,
    new: dict[str, Any] | None,
    at: dt.datetime | None = None,
) -> None:
    """Append a ``mode_history`` row (``change``: created, updated or deleted)."""
    session.add(
        ModeHistory(
            machine_id=machine_id,
            mode_name=mode_name,
            change=change,
            changed_by=user,
            changed_at=at or utcnow(),
            old_values=old,
            new_values=new,
        )
    )


def _sync_points(row: MachineRow, points: Sequence[Point], replace: bool, report: ImportReport) -> bool:
    existing = {p.id: p for p in row.points}
    had = any(p.active for p in row.points)
    changed = False
    for pos, p in enumerate(points):
        values = _point_values(p) | {"position": pos}
        prow = existing.pop(p.id, None)
        if prow is None:
            row.points.append(MeasurementPoint(id=p.id, **values))
            changed = True
        else:
            changed |= _assign(prow, values)
    pos = len(points)
    for prow in sorted(existing.values(), key=lambda r: r.position):
        if not prow.active:
            continue
        if replace:
            prow.active = False
            report.points_retired.append(f"{row.id}/{prow.id}")
            changed = True
        else:
            changed |= _assign(prow, {"position": pos})
            report.points_kept.append(f"{row.id}/{prow.id}")
            pos += 1
    if replace and had and not points:
        report.emptied.append(f"machine {row.id!r} is left with no measurement points.")
    return changed


def _sync_modes(
    session: Session,
    row: MachineRow,
    modes: Sequence[Mode],
    user: str,
    at: dt.datetime,
    replace: bool,
    report: ImportReport,
) -> bool:
    existing = {m.name: m for m in row.modes}
    wanted = {m.name for m in modes}
    changed = False
    pos = len(modes)
    for name, mrow in sorted(existing.items(), key=lambda kv: kv[1].position):
        if name in wanted:
            continue
        if replace:
            record_mode_change(session, row.id, name, "deleted", user, mrow.values(), None, at)
            row.modes.remove(mrow)
            report.modes_deleted.append(f"{row.id}/{name}")
            changed = True
        else:
            mrow.position = pos
            report.modes_kept.append(f"{row.id}/{name}")
            pos += 1
    if replace and existing and not modes:
        report.emptied.append(f"machine {row.id!r} is left with no modes.")
    for pos, mode in enumerate(modes):
        values = _mode_values(mode)
        stored = existing.get(mode.name)
        if stored is None:
            row.modes.append(ModeRow(
                name=mode.name, frequency_hz=mode.frequency_hz, damping_ratio=mode.damping_ratio,
                amplification_factor=mode.amplification_factor,
                required_margin_pct=mode.required_margin_pct, source=mode.source, date=mode.date,
                position=pos, updated_at=at))
            record_mode_change(session, row.id, mode.name, "created", user, None, values, at)
            report.modes_changed.append(f"{row.id}/{mode.name}")
            changed = True
            continue
        old = stored.values()
        stored.position = pos
        if old != values:
            _assign(stored, {
                "frequency_hz": mode.frequency_hz,
                "damping_ratio": mode.damping_ratio,
                "amplification_factor": mode.amplification_factor,
                "required_margin_pct": mode.required_margin_pct,
                "source": mode.source,
                "date": mode.date,
                "updated_at": at,
            })
            record_mode_change(session, row.id, mode.name, "updated", user, old, values, at)
            report.modes_changed.append(f"{row.id}/{mode.name}")
            changed = True
    return changed


def import_registry(
    session: Session,
    registry: Registry,
    *,
    user: str = "registry import",
    replace: bool = False,
    changed_only: bool = False,
) -> ImportReport:
    """Bring what ``registry`` names into the database (inside the caller's transaction).

    Adds and updates the machines, points and modes the registry names. What it leaves
    out is kept, unless ``replace``: then machines and points left out are retired and
    modes left out deleted (the report names them, and any machine left with no modes or
    no points). With ``changed_only`` (a service start) a machine whose entry is the same
    as when it was last imported from a file is left as the database has it, so edits
    made since (dashboard, API) stay."""
    for m in registry.machines:
        check_machine(m)
    version = touch_registry(session)  # first: the version row's lock orders registry writers
    at = utcnow()
    report = ImportReport()
    rows = {
        r.id: r
        for r in session.execute(
            select(MachineRow).options(
                selectinload(MachineRow.points), selectinload(MachineRow.modes)
            )
        ).scalars()
    }
    touched: list[MachineRow] = []
    for pos, m in enumerate(registry.machines):
        digest = entry_digest(m)
        row = rows.get(m.id)
        if changed_only and row is not None and row.file_digest == digest:
            report.machines_unchanged.append(m.id)
            continue
        values = _machine_values(m) | {"position": pos}
        if row is None:
            row = MachineRow(id=m.id, created_at=at, updated_at=at, **values)
            session.add(row)
            report.machines_added.append(m.id)
            changed = True
        else:
            changed = _assign(row, values)
            if changed:
                report.machines_updated.append(m.id)
        changed |= _sync_points(row, m.points, replace, report)
        changed |= _sync_modes(session, row, m.modes, user, at, replace, report)
        row.file_digest = digest
        if changed:
            row.updated_at = at
            touched.append(row)
    wanted = {m.id for m in registry.machines}
    pos = len(registry.machines)
    for mid, row in sorted(rows.items(), key=lambda kv: (kv[1].position, kv[0])):
        if mid in wanted or not row.active:
            continue
        if replace:
            row.active = False
            row.updated_at = at
            report.machines_retired.append(mid)
            touched.append(row)
        else:
            row.position = pos  # after the file's machines, in their former order
            pos += 1
            report.machines_kept.append(mid)
    for row in touched:
        row.registry_version = version
    session.flush()
    # One status row per active machine (monitor/store/statuses.py).
    ensure_statuses(session, wanted | set(report.machines_kept))
    drop_statuses(session, report.machines_retired)
    return report


# ----------------------------------------------------------------------------- edits


def save_mode(session: Session, machine: MachineRow, values: Mode, user: str,
              mode: ModeRow | None) -> ModeRow:
    """Create (``mode`` None) or update a mode of ``machine``, record the change in
    mode_history and move the registry version on (inside the caller's transaction).
    ``values`` passes :func:`monitor.model.bounds.check_mode` first (RegistryError)."""
    check_mode(values, machine.id)
    touch_registry(session, [machine])
    old = mode.values() if mode is not None else None
    if mode is None:
        pos = session.execute(select(func.coalesce(func.max(ModeRow.position), -1))
                              .where(ModeRow.machine_id == machine.id)).scalar_one()
        mode = ModeRow(machine_id=machine.id, position=int(pos) + 1)
        session.add(mode)
    mode.name = values.name
    mode.frequency_hz = values.frequency_hz
    mode.damping_ratio = values.damping_ratio
    mode.amplification_factor = values.amplification_factor
    mode.required_margin_pct = values.required_margin_pct
    mode.source = values.source
    mode.date = values.date
    mode.updated_at = utcnow()
    session.flush()
    record_mode_change(session, machine.id, mode.name, "created" if old is None else "updated", user,
                       old, mode.values(), at=mode.updated_at)
    return mode


#: Longest comment of a baseline restart (as of an alarm acknowledgement, docs/api.md).
MAX_COMMENT = 2000


def request_baseline_restart(session: Session, machine_id: str, point_id: str | None,
                             comment: str, user: str) -> BaselineRestart:
    """Record an engineer's request to learn the baselines of ``point_id`` (every point
    when None) of ``machine_id`` again, and move the registry version on so a running
    service applies it at its next batch. UnknownEntry for a machine or point that is
    not (or no longer) monitored; RegistryError for a blank comment."""
    text = comment.strip() if isinstance(comment, str) else ""
    if not text:
        raise RegistryError("a baseline restart needs a comment saying why (e.g. the maintenance done).")
    if len(text) > MAX_COMMENT:
        raise RegistryError(f"a baseline restart's comment must be at most {MAX_COMMENT} characters, "
                            f"got {len(text)}.")
    row = session.get(MachineRow, machine_id)
    if row is None or not row.active:
        raise UnknownEntry(f"No machine with id {machine_id!r}.")
    if point_id is not None and not any(p.id == point_id and p.active for p in row.points):
        raise UnknownEntry(f"Machine {machine_id!r} has no measurement point {point_id!r}.")
    touch_registry(session, [row])
    req = BaselineRestart(machine_id=machine_id, point_id=point_id, comment=text,
                          requested_by=user, requested_at=utcnow())
    session.add(req)
    session.flush()
    return req


def pending_baseline_restarts(session: Session) -> list[BaselineRestart]:
    """Requests not applied yet, of active machines, oldest first."""
    return list(session.scalars(
        select(BaselineRestart).join(MachineRow, MachineRow.id == BaselineRestart.machine_id)
        .where(BaselineRestart.applied_at.is_(None), MachineRow.active.is_(True))
        .order_by(BaselineRestart.id)))


def mark_baseline_restart_applied(session: Session, request_id: int, at: dt.datetime) -> bool:
    """Set ``applied_at`` unless another transaction did; True when this one did."""
    res = cast(CursorResult[Any], session.execute(  # an UPDATE's result has the row count
        update(BaselineRestart)
        .where(BaselineRestart.id == request_id, BaselineRestart.applied_at.is_(None))
        .values(applied_at=at)))
    return res.rowcount == 1


# ----------------------------------------------------------------------------- reads


def _tuple3(v: Any) -> tuple[float, float, float] | None:
    return (float(v[0]), float(v[1]), float(v[2])) if v else None


def mode_from_row(m: Any) -> Mode:
    """The registry dataclass of a stored mode (an ORM row or a row of the same columns),
    unchecked."""
    return Mode(name=m.name, frequency_hz=m.frequency_hz, damping_ratio=m.damping_ratio,
                amplification_factor=m.amplification_factor,
                required_margin_pct=m.required_margin_pct, source=m.source, date=m.date)


def mode_problem(m: Any, machine_id: str) -> str | None:
    """Why a stored mode is outside the registry's bounds (one sentence), or None."""
    try:
        check_mode(mode_from_row(m), machine_id)
    except RegistryError as exc:
        return str(exc)
    return None


def usable_modes(rows: Iterable[Any], machine_id: str) -> list[Any]:
    """The stored modes (ORM rows or column rows) within the registry's bounds."""
    return [m for m in rows if mode_problem(m, machine_id) is None]


def read_machine(row: MachineRow) -> tuple[Machine | None, list[str]]:
    """The registry dataclass of a machine row (active points only) and why any part of
    it was left out: a point or mode outside the bounds is left out; a machine whose own
    values are outside them is None."""
    problems: list[str] = []
    points = []
    for p in row.points:
        if not p.active:
            continue
        try:
            points.append(check_point(Point(id=p.id, direction=p.direction, quantity=p.quantity,
                                            unit=p.unit, fs_hz=p.fs_hz,
                                            limits_mm_s=_tuple3(p.limits_mm_s)), row.id))
        except RegistryError as exc:
            problems.append(f"left out: {exc}")
    modes = []
    for m in row.modes:
        problem = mode_problem(m, row.id)
        if problem is None:
            modes.append(mode_from_row(m))
        else:
            problems.append(f"left out: {problem}")
    try:
        machine = check_machine(Machine(
            id=row.id,
            name=row.name,
            location=row.location,
            machine_class=row.machine_class,
            speed_range_rpm=(row.speed_min_rpm, row.speed_max_rpm),
            excitation_orders=tuple(float(o) for o in row.excitation_orders or ()),
            line_frequency_hz=row.line_frequency_hz,
            points=tuple(points),
            modes=tuple(modes),
            limits_mm_s=_tuple3(row.limits_mm_s),
            settings=dict(row.settings or {}),
        ))
    except (RegistryError, TypeError) as exc:
        return None, [*problems, f"machine left out: {exc}"]
    return machine, problems


def _machine_rows(session: Session, *, since: int | None = None) -> Sequence[MachineRow]:
    q = select(MachineRow).options(selectinload(MachineRow.points), selectinload(MachineRow.modes))
    if since is None:
        q = q.where(MachineRow.active.is_(True))
    else:
        q = q.where(MachineRow.registry_version > since)
    return session.execute(q.order_by(MachineRow.position, MachineRow.id)).scalars().all()


def read_registry(session: Session) -> tuple[Registry, list[str]]:
    """The active machines as a :class:`Registry`, and one sentence for each machine,
    point or mode left out because its stored values are outside the bounds."""
    machines, problems = [], []
    for row in _machine_rows(session):
        machine, why = read_machine(row)
        problems += why
        if machine is not None:
            machines.append(machine)
    return Registry(machines=tuple(machines)), problems


def changed_machines(session: Session, since: int) -> tuple[dict[str, Machine | None], list[str]]:
    """Machines written after registry version ``since``: each id with its registry entry,
    or None when it was retired or is unusable; and why anything was left out."""
    out: dict[str, Machine | None] = {}
    problems: list[str] = []
    for row in _machine_rows(session, since=since):
        if not row.active:
            out[row.id] = None
            continue
        machine, why = read_machine(row)
        out[row.id] = machine
        problems += why
    return out, problems


def export_registry(session: Session) -> Registry:
    """The active machines of the database as a :class:`Registry` (write it with
    ``monitor.model.registry_file.dump_registry``); entries outside the bounds are left out
    (:func:`read_registry` says which)."""
    return read_registry(session)[0]
