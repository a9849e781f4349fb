"""Reads of the machines: one machine's page, its modes and their history, the baseline
restarts asked for (the plant overview: monitor/store/reads/overview.py).

Every page-level read issues a fixed number of SQL statements whatever the number of
machines or stored readings: the latest reading per point by an indexed correlated lookup.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session, aliased

from monitor.model.timefmt import iso_utc
from monitor.store.machine_stops import running_json
from monitor.store.models import (
    BaselineRestart,
    Machine,
    Measurement,
    MeasurementPoint,
    Mode,
    ModeHistory,
)
from monitor.store.reads.alarms import open_alarm_counts
from monitor.store.reads.evaluations import (
    current_margins,
    evaluation_view,
    feature_json,
    mode_bands,
    point_zone_limits,
)
from monitor.store.reads.hints import machine_hints_json
from monitor.store.reads.spectra import latest_spectra, reading_speeds, spectrum_json
from monitor.store.reads.speeds import (
    RunningSpeed,
    SpeedCandidate,
    health_flags,
    latest_speed_readings,
    running_speed,
)
from monitor.store.registry_sync import mode_problem


def get_machine(s: Session, machine_id: str) -> Machine | None:
    """One machine (its points and modes load when first used), or None."""
    return s.get(Machine, machine_id)


def machine_list(s: Session) -> list[dict[str, Any]]:
    """Ids and names of active machines (for filter menus)."""
    return [{"id": i, "name": n or i} for i, n in s.execute(
        select(Machine.id, Machine.name).where(Machine.active.is_(True)).order_by(Machine.position, Machine.id))]


def _newest_id() -> Any:
    # The newest measurement of a point: one indexed lookup through the
    # (machine_id, point_id, ts) unique index, correlated to measurement_points.
    inner = aliased(Measurement)
    return (
        select(inner.id)
        .where(inner.machine_id == MeasurementPoint.machine_id, inner.point_id == MeasurementPoint.id)
        .order_by(inner.ts.desc())
        .limit(1)
        .correlate(MeasurementPoint)
        .scalar_subquery()
    )


def _latest_per_point(s: Session, machine_id: str) -> list[Measurement]:
    """The newest measurement of every active point of a machine, one statement."""
    return list(s.scalars(
        select(Measurement)
        .join(MeasurementPoint, Measurement.id == _newest_id())
        .where(MeasurementPoint.active.is_(True), MeasurementPoint.machine_id == machine_id)
    ))


def _machine_state(n_open: int, latest: dt.datetime | None) -> str:
    if n_open:
        return "alarm"
    return "no_data" if latest is None else "normal"


def _current_margins(m: Any, modes: Sequence[Any], speed: RunningSpeed, evaluation: Any) -> list[dict[str, Any]]:
    """The margin table at the running speed: the one stored with the reading the speed
    came from when it still fits (:func:`current_margins`), else computed at the speed (a
    speed reading's, or when the reading's stored table is not at hand)."""
    me = speed.reading
    return current_margins(m, modes, speed.speed_hz, evaluation if me is not None else None,
                           me.stored_at if me is not None else None)


def machine_modes(s: Session, machine_id: str) -> list[Mode]:
    """The stored modes of a machine, in registry order."""
    return list(s.scalars(select(Mode).where(Mode.machine_id == machine_id).order_by(Mode.position, Mode.id)))


def mode_named(s: Session, machine_id: str, name: str) -> Mode | None:
    """The mode of a machine with this name, or None."""
    return s.scalar(select(Mode).where(Mode.machine_id == machine_id, Mode.name == name))


def mode_json(mo: Mode) -> dict[str, Any]:
    """A stored mode; ``valid`` false and ``problem`` (one sentence) when its values lie
    outside the registry's bounds, so neither the service nor the margins use it."""
    d = mo.values()
    problem = mode_problem(mo, mo.machine_id)
    d.update({"id": mo.id, "updated_at": iso_utc(mo.updated_at), "valid": problem is None, "problem": problem})
    return d


def mode_history(s: Session, machine_id: str, limit: int = 200) -> list[dict[str, Any]]:
    """The recorded changes of a machine's modes, newest first."""
    rows = s.scalars(select(ModeHistory).where(ModeHistory.machine_id == machine_id)
                     .order_by(ModeHistory.changed_at.desc(), ModeHistory.id.desc()).limit(limit))
    return [{"id": h.id, "mode": h.mode_name, "change": h.change, "changed_by": h.changed_by,
             "changed_at": iso_utc(h.changed_at), "old": h.old_values, "new": h.new_values} for h in rows]


def recent_baseline_restarts(s: Session, machine_id: str, limit: int = 20) -> list[BaselineRestart]:
    """The newest baseline restarts asked for a machine, newest first."""
    return list(s.scalars(
        select(BaselineRestart).where(BaselineRestart.machine_id == machine_id)
        .order_by(BaselineRestart.requested_at.desc(), BaselineRestart.id.desc()).limit(limit)))


def baseline_restart_json(r: BaselineRestart) -> dict[str, Any]:
    """A baseline restart asked for, and when the service applied it."""
    return {"id": r.id, "machine": r.machine_id, "point": r.point_id, "comment": r.comment,
            "requested_by": r.requested_by, "requested_at": iso_utc(r.requested_at),
            "applied_at": iso_utc(r.applied_at)}


def machine_detail(s: Session, m: Machine) -> dict[str, Any]:
    """One machine: points, modes, latest readings and spectra, margins, open alarms."""
    points = s.scalars(select(MeasurementPoint).where(
        MeasurementPoint.machine_id == m.id, MeasurementPoint.active.is_(True)).order_by(MeasurementPoint.position)).all()
    modes = machine_modes(s, m.id)
    latest = {r.point_id: r for r in _latest_per_point(s, m.id)}
    newest = max(latest.values(), key=lambda r: r.ts) if latest else None
    speed = running_speed((SpeedCandidate(r.ts, r.speed_hz, r.speed_source, not health_flags(r.health), r)
                           for r in latest.values()), latest_speed_readings(s, m.id).get(m.id))
    n_open = sum(open_alarm_counts(s, m.id).get(m.id, {}).values())
    pts = []
    for p in points:
        me = latest.get(p.id)
        view = evaluation_view(me.evaluation if me is not None else None)
        lim = point_zone_limits(m, p)
        overall = view["features"].get("overall", {})
        pts.append({
            "id": p.id, "direction": p.direction, "quantity": p.quantity, "unit": p.unit,
            "zone_limits_mm_s": list(lim.as_tuple()) if lim else view["zone_limits_mm_s"],
            "zone_limits_source": lim.source if lim else view["zone_limits_source"],
            "latest": None if me is None else {
                "ts": iso_utc(me.ts), "zone": me.zone, "overall_mm_s_rms": me.overall_velocity_mm_s_rms,
                "speed_hz": me.speed_hz, "speed_source": me.speed_source,
                "orders": me.orders, "peaks": me.peaks},
            # The learned baseline of the overall level (mm/s RMS; None while learning).
            "baseline_mm_s_rms": overall.get("baseline_median"),
            "features": [feature_json(f) for f in view["features"].values()],
            "growth_ignored": view["growth_ignored"],
        })
    margins = _current_margins(m, modes, speed, speed.reading.evaluation if speed.reading is not None else None)
    spectra = latest_spectra(s, m.id)
    spectrum_speeds = reading_speeds(s, spectra)
    return {
        "id": m.id, "name": m.name or m.id, "location": m.location, "class": m.machine_class,
        "speed_range_rpm": [m.speed_min_rpm, m.speed_max_rpm],
        "excitation_orders": m.excitation_orders, "line_frequency_hz": m.line_frequency_hz,
        "state": _machine_state(n_open, newest.ts if newest else speed.at),
        "active_alarms": n_open,
        **speed.to_json(),
        "last_reading_at": iso_utc(newest.ts) if newest else None,
        "points": pts,
        "modes": [mode_json(x) for x in modes],
        "margins": margins,
        # The shaded bands of the charts: the margin rule's own edges, per mode.
        "mode_bands": mode_bands(m, modes),
        "latest_spectra": [spectrum_json(sn, speed_hz=spectrum_speeds[sn.id]) for sn in spectra],
        "likely_causes": machine_hints_json(m, points, latest, spectra, margins),
        "baseline_restarts": [baseline_restart_json(r) for r in recent_baseline_restarts(s, m.id)],
        "running": running_json(s, m.id),
    }
