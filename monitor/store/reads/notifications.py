"""The notification delivery attempts of an alarm (monitor/store/delivery_models.py)."""

from __future__ import annotations

from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from monitor.model.timefmt import iso_utc
from monitor.store.delivery_models import NotificationDelivery

#: Most attempts shown with one alarm (newest kept): a dead target retried on every
#: transition for months must not make the alarm's page unbounded.
MAX_DELIVERIES = 200


def delivery_json(d: NotificationDelivery) -> dict[str, Any]:
    """One attempt in the JSON shape of the API (docs/api.md, the alarm's ``notifications``)."""
    return {"transition": d.transition, "transition_at": iso_utc(d.transition_at), "target": d.target,
            "destination": d.destination, "attempt": d.attempt, "outcome": d.outcome,
            "detail": d.detail, "at": iso_utc(d.at)}


def alarm_deliveries(s: Session, alarm_id: int) -> list[dict[str, Any]]:
    """The delivery attempts of alarm ``alarm_id``, oldest first (the newest
    :data:`MAX_DELIVERIES`)."""
    rows = s.scalars(select(NotificationDelivery).where(NotificationDelivery.alarm_id == alarm_id)
                     .order_by(NotificationDelivery.id.desc()).limit(MAX_DELIVERIES)).all()
    return [delivery_json(d) for d in reversed(rows)]
