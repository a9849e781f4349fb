"""Reads the service and the dashboard share.

Each function runs a fixed number of statements whatever the number of machines (the
dashboard's cost must not grow with the plant): latest measurement of every point in one
statement, active alarms of every machine in one statement, trends decimated in SQL.
"""

from __future__ import annotations

import base64
import datetime as dt
import json
from collections import defaultdict
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from sqlalchemy import and_, func, or_, select
from sqlalchemy.orm import Session, selectinload

from monitor.model.timefmt import iso_utc
from monitor.store.models import (
    Alarm,
    AlarmTransitionRow,
    DeadLetter,
    DetectorState,
    Machine,
    Measurement,
    SpectrumSnapshot,
    SpeedReadingRow,
)
from monitor.store.writes import CLOSED_STATES

TREND_METRICS = {
    "overall_velocity_mm_s_rms": Measurement.overall_velocity_mm_s_rms,
    "speed_hz": Measurement.speed_hz,
    "one_x_normalised": Measurement.one_x_normalised,
    "speed_uncertainty_hz": Measurement.speed_uncertainty_hz,
}


# ----------------------------------------------------------------------------- registry


def list_machines(session: Session, *, include_retired: bool = False) -> list[Machine]:
    """Machines with their points and modes loaded (three statements in all)."""
    stmt = (
        select(Machine)
        .options(selectinload(Machine.points), selectinload(Machine.modes))
        .order_by(Machine.position, Machine.id)
    )
    if not include_retired:
        stmt = stmt.where(Machine.active.is_(True))
    return list(session.execute(stmt).scalars())


def get_machine(session: Session, machine_id: str) -> Machine | None:
    """One machine with points and modes, or None."""
    return session.execute(
        select(Machine)
        .options(selectinload(Machine.points), selectinload(Machine.modes))
        .where(Machine.id == machine_id)
    ).scalar_one_or_none()


# ----------------------------------------------------------------------------- measurements


def latest_measurements(
    session: Session, machine_ids: Sequence[str] | None = None
) -> dict[tuple[str, str], Measurement]:
    """The newest measurement of every (machine, point), in one statement.

    Uses the (machine_id, point_id, ts) unique index: a grouped max(ts) joined back.
    """
    newest = select(
        Measurement.machine_id.label("m"),
        Measurement.point_id.label("p"),
        func.max(Measurement.ts).label("ts"),
    ).group_by(Measurement.machine_id, Measurement.point_id)
    if machine_ids is not None:
        newest = newest.where(Measurement.machine_id.in_(list(machine_ids)))
    sub = newest.subquery()
    rows = session.execute(
        select(Measurement).join(
            sub,
            and_(
                Measurement.machine_id == sub.c.m,
                Measurement.point_id == sub.c.p,
                Measurement.ts == sub.c.ts,
            ),
        )
    ).scalars()
    return {(r.machine_id, r.point_id): r for r in rows}


def latest_measurement(session: Session, machine_id: str, point_id: str) -> Measurement | None:
    """The newest measurement of one point, or None."""
    return session.execute(
        select(Measurement)
        .where(Measurement.machine_id == machine_id, Measurement.point_id == point_id)
        .order_by(Measurement.ts.desc())
        .limit(1)
    ).scalar_one_or_none()


def measurements(
    session: Session,
    machine_id: str,
    point_id: str | None = None,
    *,
    start: dt.datetime | None = None,
    end: dt.datetime | None = None,
    limit: int = 1000,
) -> list[Measurement]:
    """Measurements of a machine (optionally one point) in [start, end), oldest first."""
    stmt = select(Measurement).where(Measurement.machine_id == machine_id)
    if point_id is not None:
        stmt = stmt.where(Measurement.point_id == point_id)
    if start is not None:
        stmt = stmt.where(Measurement.ts >= start)
    if end is not None:
        stmt = stmt.where(Measurement.ts < end)
    return list(session.execute(stmt.order_by(Measurement.ts).limit(limit)).scalars())


@dataclass(frozen=True)
class TrendPoint:
    """One bucket of a decimated trend: first time, mean, min, max and row count."""

    ts: dt.datetime
    mean: float | None
    min: float | None
    max: float | None
    count: int


def trend(
    session: Session,
    machine_id: str,
    point_id: str,
    start: dt.datetime,
    end: dt.datetime,
    *,
    metric: str = "overall_velocity_mm_s_rms",
    max_points: int = 500,
) -> list[TrendPoint]:
    """``metric`` of one point in [start, end), decimated in SQL to at most
    ``max_points`` buckets of equal row count (``ntile``), each with mean, min and max
    so short excursions survive the decimation. One statement."""
    column = TREND_METRICS.get(metric)
    if column is None:
        raise ValueError(f"metric {metric!r} is not one of {sorted(TREND_METRICS)}.")
    if max_points < 1:
        raise ValueError(f"max_points must be at least 1, got {max_points!r}.")
    inner = (
        select(
            Measurement.ts.label("ts"),
            column.label("v"),
            func.ntile(max_points).over(order_by=Measurement.ts).label("bucket"),
        )
        .where(
            Measurement.machine_id == machine_id,
            Measurement.point_id == point_id,
            Measurement.ts >= start,
            Measurement.ts < end,
        )
        .subquery()
    )
    rows = session.execute(
        select(
            func.min(inner.c.ts),
            func.avg(inner.c.v),
            func.min(inner.c.v),
            func.max(inner.c.v),
            func.count(),
        )
        .group_by(inner.c.bucket)
        .order_by(inner.c.bucket)
    ).all()
    return [
        TrendPoint(
            ts=r[0],
            mean=None if r[1] is None else float(r[1]),
            min=None if r[2] is None else float(r[2]),
            max=None if r[3] is None else float(r[3]),
            count=int(r[4]),
        )
        for r in rows
    ]


def speed_readings(
    session: Session, machine_id: str, start: dt.datetime, end: dt.datetime, *, limit: int = 10_000
) -> list[SpeedReadingRow]:
    """Speed readings of a machine in [start, end), oldest first."""
    return list(
        session.execute(
            select(SpeedReadingRow)
            .where(
                SpeedReadingRow.machine_id == machine_id,
                SpeedReadingRow.ts >= start,
                SpeedReadingRow.ts < end,
            )
            .order_by(SpeedReadingRow.ts)
            .limit(limit)
        ).scalars()
    )


def latest_spectrum(
    session: Session, machine_id: str, point_id: str, *, kind: str = "velocity"
) -> SpectrumSnapshot | None:
    """The newest stored spectrum of a point (``kind`` 'velocity' or 'native')."""
    return session.execute(
        select(SpectrumSnapshot)
        .where(
            SpectrumSnapshot.machine_id == machine_id,
            SpectrumSnapshot.point_id == point_id,
            SpectrumSnapshot.kind == kind,
        )
        .order_by(SpectrumSnapshot.ts.desc())
        .limit(1)
    ).scalar_one_or_none()


# ----------------------------------------------------------------------------- alarms


@dataclass(frozen=True)
class AlarmPage:
    """A page of alarms, newest raised first; ``next`` is the cursor of the next page."""

    items: list[Alarm]
    next: str | None


def _encode_cursor(alarm: Alarm) -> str:
    raw = json.dumps([alarm.raised_at.isoformat(), alarm.id]).encode()
    return base64.urlsafe_b64encode(raw).decode().rstrip("=")


def _decode_cursor(cursor: str) -> tuple[dt.datetime, int]:
    try:
        raw = base64.urlsafe_b64decode(cursor + "=" * (-len(cursor) % 4))
        ts, aid = json.loads(raw)
        return dt.datetime.fromisoformat(ts), int(aid)
    except (ValueError, TypeError) as exc:
        raise ValueError(f"cursor {cursor!r} is not one this API returned.") from exc


def list_alarms(
    session: Session,
    *,
    machine: str | None = None,
    state: str | Sequence[str] | None = None,
    kind: str | None = None,
    since: dt.datetime | None = None,
    until: dt.datetime | None = None,
    active: bool | None = None,
    limit: int = 50,
    cursor: str | None = None,
) -> AlarmPage:
    """Alarms filtered by machine, state(s), kind, raised time in [since, until) and
    active (not cleared), newest first, keyset-paginated by ``cursor``. One statement."""
    if not 1 <= limit <= 1000:
        raise ValueError(f"limit must be between 1 and 1000, got {limit!r}.")
    stmt = select(Alarm)
    if machine is not None:
        stmt = stmt.where(Alarm.machine_id == machine)
    if state is not None:
        states = [state] if isinstance(state, str) else list(state)
        stmt = stmt.where(Alarm.state.in_(states))
    if active is True:
        stmt = stmt.where(Alarm.state.not_in(CLOSED_STATES))
    elif active is False:
        stmt = stmt.where(Alarm.state.in_(CLOSED_STATES))
    if kind is not None:
        stmt = stmt.where(Alarm.kind == kind)
    if since is not None:
        stmt = stmt.where(Alarm.raised_at >= since)
    if until is not None:
        stmt = stmt.where(Alarm.raised_at < until)
    if cursor is not None:
        c_ts, c_id = _decode_cursor(cursor)
        stmt = stmt.where(
            or_(Alarm.raised_at < c_ts, and_(Alarm.raised_at == c_ts, Alarm.id < c_id))
        )
    rows = list(
        session.execute(
            stmt.order_by(Alarm.raised_at.desc(), Alarm.id.desc()).limit(limit + 1)
        ).scalars()
    )
    more = len(rows) > limit
    items = rows[:limit]
    return AlarmPage(items=items, next=_encode_cursor(items[-1]) if more else None)


def active_alarms(
    session: Session, machine_ids: Sequence[str] | None = None
) -> dict[str, list[Alarm]]:
    """Alarms not cleared, grouped by machine, newest first, in one statement."""
    stmt = select(Alarm).where(Alarm.state.not_in(CLOSED_STATES))
    if machine_ids is not None:
        stmt = stmt.where(Alarm.machine_id.in_(list(machine_ids)))
    out: dict[str, list[Alarm]] = defaultdict(list)
    for a in session.execute(stmt.order_by(Alarm.raised_at.desc(), Alarm.id.desc())).scalars():
        out[a.machine_id].append(a)
    return dict(out)


def active_alarm_counts(session: Session) -> dict[str, dict[str, int]]:
    """Number of alarms not cleared per machine and severity, in one statement."""
    rows = session.execute(
        select(Alarm.machine_id, Alarm.severity, func.count())
        .where(Alarm.state.not_in(CLOSED_STATES))
        .group_by(Alarm.machine_id, Alarm.severity)
    ).all()
    out: dict[str, dict[str, int]] = defaultdict(dict)
    for m, sev, n in rows:
        out[m][sev] = int(n)
    return dict(out)


def alarm_counts_by_state(session: Session) -> dict[str, int]:
    """Alarms per state over the whole history (for metrics)."""
    return {
        s: int(n)
        for s, n in session.execute(select(Alarm.state, func.count()).group_by(Alarm.state)).all()
    }


def get_alarm(session: Session, alarm_id: int) -> Alarm | None:
    """One alarm with its transitions loaded, or None."""
    return session.execute(
        select(Alarm).options(selectinload(Alarm.transitions)).where(Alarm.id == alarm_id)
    ).scalar_one_or_none()


def alarm_transitions(session: Session, alarm_id: int) -> list[AlarmTransitionRow]:
    """Transitions of one alarm, oldest first."""
    return list(
        session.execute(
            select(AlarmTransitionRow)
            .where(AlarmTransitionRow.alarm_id == alarm_id)
            .order_by(AlarmTransitionRow.at, AlarmTransitionRow.id)
        ).scalars()
    )


def alarm_as_json(alarm: Alarm) -> dict[str, Any]:
    """The alarm in the JSON shape of the REST API; an MQTT alarm event is this object
    with the event's own ``transition`` and ``transition_at`` added (monitor.service.service)."""

    return {
        "id": alarm.id,
        "machine": alarm.machine_id,
        "point": alarm.point_id,
        "kind": alarm.kind,
        "subject": alarm.subject,
        "severity": alarm.severity,
        "state": alarm.state,
        "raised_at": iso_utc(alarm.raised_at),
        "cleared_at": iso_utc(alarm.cleared_at),
        "acknowledged_by": alarm.acknowledged_by,
        "acknowledged_at": iso_utc(alarm.acknowledged_at),
        "ack_comment": alarm.ack_comment,
        "evidence": alarm.evidence,
        "last_transition": alarm.last_transition,
        "last_transition_at": iso_utc(alarm.last_transition_at),
    }


# ----------------------------------------------------------------------------- service


def load_detector_states(session: Session) -> dict[str, dict[str, Any]]:
    """Every machine's saved detector state, by machine id (one statement)."""
    return {r.machine_id: r.state for r in session.execute(select(DetectorState)).scalars()}


def dead_letter_counts(session: Session) -> dict[str, int]:
    """Dead letters per reason."""
    return {
        r: int(n)
        for r, n in session.execute(
            select(DeadLetter.reason, func.count()).group_by(DeadLetter.reason)
        ).all()
    }


def recent_dead_letters(session: Session, limit: int = 100) -> list[DeadLetter]:
    """The newest dead letters."""
    return list(
        session.execute(
            select(DeadLetter).order_by(DeadLetter.at.desc(), DeadLetter.id.desc()).limit(limit)
        ).scalars()
    )
