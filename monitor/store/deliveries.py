"""Writing the record of a notification delivery attempt (the notifier's worker threads,
monitor/notify/dispatch.py; each attempt in its own short transaction, outside the
service's batches)."""

from __future__ import annotations

import datetime as dt

from sqlalchemy.orm import Session

from monitor.store.delivery_models import DELIVERY_OUTCOMES, NotificationDelivery


def record_delivery(s: Session, *, alarm_id: int, transition: str, transition_at: dt.datetime,
                    target: str, destination: str, attempt: int, outcome: str, detail: str,
                    at: dt.datetime) -> None:
    """Add one attempt's row to the caller's transaction (times timezone-aware UTC)."""
    if outcome not in DELIVERY_OUTCOMES:
        raise ValueError(f"outcome must be one of {DELIVERY_OUTCOMES}, got {outcome!r}.")
    s.add(NotificationDelivery(
        alarm_id=alarm_id, transition=transition, transition_at=transition_at, target=target,
        destination=destination[:500], attempt=attempt, outcome=outcome, detail=detail, at=at))
