"""Reads of the alarm history: the one JSON shape of an alarm (REST API and MQTT alarm
events), filtered pages for the dashboard, counts for the metrics, rows for the service's
alarm events."""

from __future__ import annotations

import datetime as dt
from collections import defaultdict
from collections.abc import Sequence
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session, selectinload

from monitor.model.timefmt import iso_utc
from monitor.store.models import Alarm, utcnow
from monitor.store.shelving import shelf_json

#: The states of an alarm not cleared: every state of monitor/detection/alarms.py but
#: ``CLOSED_STATES`` (monitor/store/writes.py), listed so the (state, machine_id) index
#: serves ``state IN (...)``.
OPEN_STATES = ("active", "acknowledged")


def alarm_json(alarm: Alarm, *, with_transitions: bool = False, now: dt.datetime | None = None) -> dict[str, Any]:
    """The alarm in the JSON shape of the REST API (docs/api.md), with its transitions
    (oldest first) when asked; an MQTT alarm event is this object (without transitions)
    with the event's own fields added (monitor/service/payloads.py). Its shelving is as of
    ``now`` (default: the clock; monitor/store/shelving.py)."""
    out: dict[str, Any] = {
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
        **shelf_json(alarm, utcnow() if now is None else now),
    }
    if with_transitions:
        out["transitions"] = [
            {"id": t.id, "transition": t.transition, "severity": t.severity, "state": t.state,
             "at": iso_utc(t.at), "user": t.user, "evidence": t.evidence,
             "spectrum_id": t.spectrum_snapshot_id, "shelved": bool(t.shelved)}
            for t in alarm.transitions
        ]
    return out


def get_alarm(s: Session, alarm_id: int) -> Alarm | None:
    """One alarm with its transitions loaded, or None."""
    return s.scalar(select(Alarm).options(selectinload(Alarm.transitions)).where(Alarm.id == alarm_id))


def find_alarms(s: Session, *, state: str | None = None, kind: str | None = None,
                severity: str | None = None, machine: str | None = None, point: str | None = None,
                since: dt.datetime | None = None, until: dt.datetime | None = None,
                before_id: int | None = None, limit: int = 50) -> tuple[list[Alarm], int | None]:
    """Alarms newest first, filtered (``state`` ``open`` means not cleared; raised time
    in [since, until]); keyset pagination on id. Returns (rows, next ``before_id``)."""
    q = select(Alarm)
    if state == "open":
        q = q.where(Alarm.state.in_(OPEN_STATES))
    elif state:
        q = q.where(Alarm.state == state)
    if kind:
        q = q.where(Alarm.kind == kind)
    if severity:
        q = q.where(Alarm.severity == severity)
    if machine:
        q = q.where(Alarm.machine_id == machine)
    if point:
        q = q.where(Alarm.point_id == point)
    if since:
        q = q.where(Alarm.raised_at >= since)
    if until:
        q = q.where(Alarm.raised_at <= until)
    if before_id is not None:
        q = q.where(Alarm.id < before_id)
    rows = s.scalars(q.order_by(Alarm.id.desc()).limit(limit + 1)).all()
    nxt = rows[limit - 1].id if len(rows) > limit else None
    return list(rows[:limit]), nxt


def open_alarm_counts(s: Session, machine_id: str | None = None) -> dict[str, dict[str, int]]:
    """Alarms not cleared per machine and severity (of one machine, or of all), in one
    statement."""
    q = select(Alarm.machine_id, Alarm.severity, func.count()).where(Alarm.state.in_(OPEN_STATES))
    if machine_id is not None:
        q = q.where(Alarm.machine_id == machine_id)
    out: dict[str, dict[str, int]] = defaultdict(dict)
    for mid, severity, n in s.execute(q.group_by(Alarm.machine_id, Alarm.severity)):
        out[mid][severity] = int(n)
    return dict(out)


def alarm_counts_by_state(s: Session) -> dict[str, int]:
    """Alarms per state over the whole history (for the metrics)."""
    return {state: int(n) for state, n in s.execute(select(Alarm.state, func.count()).group_by(Alarm.state))}


def machines_with_open_alarms(s: Session) -> list[str]:
    """Machines with an alarm not cleared (a starting service settles their alarms)."""
    return list(s.scalars(select(Alarm.machine_id).where(Alarm.state.in_(OPEN_STATES)).distinct()))


def alarms_by_id(s: Session, ids: Sequence[int]) -> dict[int, Alarm]:
    """The alarm rows of ``ids`` (those that exist), by id, in one statement."""
    if not ids:
        return {}
    return {a.id: a for a in s.scalars(select(Alarm).where(Alarm.id.in_(list(ids))))}


def newest_alarm_with_ref(s: Session, ref: str) -> Alarm | None:
    """The newest alarm row of the alarm engine's id ``ref``, or None."""
    return s.scalar(select(Alarm).where(Alarm.ref == ref).order_by(Alarm.id.desc()).limit(1))
