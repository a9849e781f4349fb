"""Reads the service and the dashboard share."""

from __future__ import annotations

from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from monitor.model.timefmt import iso_utc
from monitor.store.models import Alarm


def alarm_counts_by_state(session: Session) -> dict[str, int]:
    """Alarms per state over the whole history (for metrics)."""
    return {
        s: int(n)
        for s, n in session.execute(select(Alarm.state, func.count()).group_by(Alarm.state)).all()
    }


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
