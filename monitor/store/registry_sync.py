"""Import and export the machine registry between its TOML file and the database.

Import makes the database match the file: machines, points and modes are added or
updated; a machine or point missing from the file is retired (``active = False``), not
deleted, so its measurements and alarm history stay; a mode missing from the file is
deleted. Every mode change writes a ``mode_history`` row (who, when, old and new values).
Export writes the active registry back, so ``export(import(file)) == file`` as data.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session, selectinload

from monitor.registry import Machine, Mode, Point, Registry
from monitor.store.models import Machine as MachineRow
from monitor.store.models import MeasurementPoint, ModeHistory, utcnow
from monitor.store.models import Mode as ModeRow
from monitor.store.writes import jsonable


@dataclass
class ImportReport:
    """What an import changed (machine ids; modes as 'machine/mode')."""

    machines_added: list[str] = field(default_factory=list)
    machines_updated: list[str] = field(default_factory=list)
    machines_retired: list[str] = field(default_factory=list)
    modes_changed: list[str] = field(default_factory=list)

    def summary(self) -> str:
        return (
            f"{len(self.machines_added)} machines added, {len(self.machines_updated)} updated, "
            f"{len(self.machines_retired)} retired, {len(self.modes_changed)} mode changes"
        )


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


def _sync_modes(
    session: Session,
    row: MachineRow,
    modes: tuple[Mode, ...],
    user: str,
    at: dt.datetime,
    report: ImportReport,
) -> None:
    existing = {m.name: m for m in row.modes}
    wanted = {m.name for m in modes}
    for name, mrow in list(existing.items()):
        if name not in wanted:
            record_mode_change(session, row.id, name, "deleted", user, mrow.values(), None, at)
            row.modes.remove(mrow)
            report.modes_changed.append(f"{row.id}/{name}")
    for pos, mode in enumerate(modes):
        values = _mode_values(mode)
        mrow = existing.get(mode.name)
        if mrow is None:
            row.modes.append(
                ModeRow(
                    name=mode.name,
                    frequency_hz=mode.frequency_hz,
                    damping_ratio=mode.damping_ratio,
                    amplification_factor=mode.amplification_factor,
                    required_margin_pct=mode.required_margin_pct,
                    source=mode.source,
                    date=mode.date,
                    position=pos,
                    updated_at=at,
                )
            )
            record_mode_change(session, row.id, mode.name, "created", user, None, values, at)
            report.modes_changed.append(f"{row.id}/{mode.name}")
            continue
        old = mrow.values()
        mrow.position = pos
        if old != values:
            _assign(
                mrow,
                {
                    "frequency_hz": mode.frequency_hz,
                    "damping_ratio": mode.damping_ratio,
                    "amplification_factor": mode.amplification_factor,
                    "required_margin_pct": mode.required_margin_pct,
                    "source": mode.source,
                    "date": mode.date,
                    "updated_at": at,
                },
            )
            record_mode_change(session, row.id, mode.name, "updated", user, old, values, at)
            report.modes_changed.append(f"{row.id}/{mode.name}")


def import_registry(
    session: Session,
    registry: Registry,
    *,
    user: str = "registry import",
    retire_missing: bool = True,
) -> ImportReport:
    """Make the database's registry match ``registry`` (inside the caller's transaction)."""
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
    for pos, m in enumerate(registry.machines):
        values = _machine_values(m) | {"position": pos}
        row = rows.get(m.id)
        if row is None:
            row = MachineRow(id=m.id, created_at=at, updated_at=at, **values)
            session.add(row)
            report.machines_added.append(m.id)
        elif _assign(row, values):
            row.updated_at = at
            report.machines_updated.append(m.id)
        points = {p.id: p for p in row.points}
        for ppos, p in enumerate(m.points):
            pvalues = _point_values(p) | {"position": ppos}
            prow = points.pop(p.id, None)
            if prow is None:
                row.points.append(MeasurementPoint(id=p.id, **pvalues))
            else:
                _assign(prow, pvalues)
        for prow in points.values():
            prow.active = False
        _sync_modes(session, row, m.modes, user, at, report)
    if retire_missing:
        wanted = {m.id for m in registry.machines}
        for mid, row in rows.items():
            if mid not in wanted and row.active:
                row.active = False
                row.updated_at = at
                report.machines_retired.append(mid)
    session.flush()
    return report


def _tuple3(v: Any) -> tuple[float, float, float] | None:
    return (float(v[0]), float(v[1]), float(v[2])) if v else None


def machine_from_row(row: MachineRow) -> Machine:
    """The registry dataclass of a machine row (active points only)."""
    return Machine(
        id=row.id,
        name=row.name,
        location=row.location,
        machine_class=row.machine_class,
        speed_range_rpm=(row.speed_min_rpm, row.speed_max_rpm),
        excitation_orders=tuple(float(o) for o in row.excitation_orders),
        line_frequency_hz=row.line_frequency_hz,
        points=tuple(
            Point(
                id=p.id,
                direction=p.direction,
                quantity=p.quantity,
                unit=p.unit,
                fs_hz=p.fs_hz,
                limits_mm_s=_tuple3(p.limits_mm_s),
            )
            for p in row.points
            if p.active
        ),
        modes=tuple(
            Mode(
                name=m.name,
                frequency_hz=m.frequency_hz,
                damping_ratio=m.damping_ratio,
                amplification_factor=m.amplification_factor,
                required_margin_pct=m.required_margin_pct,
                source=m.source,
                date=m.date,
            )
            for m in row.modes
        ),
        limits_mm_s=_tuple3(row.limits_mm_s),
        settings=dict(row.settings or {}),
    )


def export_registry(session: Session) -> Registry:
    """The active machines of the database as a :class:`Registry` (write it with
    ``monitor.registry.dump_registry``)."""
    rows = session.execute(
        select(MachineRow)
        .options(selectinload(MachineRow.points), selectinload(MachineRow.modes))
        .where(MachineRow.active.is_(True))
        .order_by(MachineRow.position, MachineRow.id)
    ).scalars()
    return Registry(machines=tuple(machine_from_row(r) for r in rows))
