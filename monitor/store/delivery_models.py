"""The record of each notification delivery attempt (monitor/notify/dispatch.py): one row
per attempt of one alarm transition to one target, kept with the alarm (alarm history is
never deleted, and neither is this)."""

from __future__ import annotations

import datetime as dt

from sqlalchemy import ForeignKey, Index, Integer, String, Text
from sqlalchemy.orm import Mapped, mapped_column

from monitor.store.models import Base, BigId, UTCDateTime

#: Outcomes of an attempt: delivered; failed and to be tried again; failed for the last time.
DELIVERY_OUTCOMES = ("delivered", "failed", "gave_up")


class NotificationDelivery(Base):
    """One delivery attempt: which alarm transition, to which target ('webhook' or
    'email') and destination (URL without query or credentials; recipients), the attempt
    number (1 = first), its outcome and what the target answered."""

    __tablename__ = "notification_deliveries"
    __table_args__ = (Index(None, "alarm_id", "id"),)

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    alarm_id: Mapped[int] = mapped_column(BigId, ForeignKey("alarms.id"))
    transition: Mapped[str] = mapped_column(String(32))
    transition_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    target: Mapped[str] = mapped_column(String(16))
    destination: Mapped[str] = mapped_column(String(500))
    attempt: Mapped[int] = mapped_column(Integer)
    outcome: Mapped[str] = mapped_column(String(16))
    detail: Mapped[str] = mapped_column(Text)
    at: Mapped[dt.datetime] = mapped_column(UTCDateTime)
