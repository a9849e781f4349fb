"""Out of service: a machine or one of its points taken out for planned work.

In the vocabulary of ISA-18.2 and IEC 62682 (alarm management), an alarm is suppressed
while its equipment is *out of service*. Here a period of planned work is one row of
``out_of_service``: the machine, the point (None: the whole machine), who put it out and
why (a comment is required), from when, optionally until when, and when it returned to
service (``ended_at``; None while it lasts). While a period lasts the service raises no
alarm from the readings it covers and learns no baseline or trend from them; the readings
are still stored, marked (monitor/service/suppression.py, docs/alarms.md "Shelving and
out of service"). A period with an ``until`` time ends by itself at that time: it counts
as over from then on, whoever reads it (:func:`covers`).

Writes here run inside the caller's transaction and add their audit rows
(monitor/store/audit.py) in it, so a change is never stored without its row.
"""

from __future__ import annotations

import datetime as dt

from sqlalchemy import ForeignKey, Index, String, Text, or_, select
from sqlalchemy.orm import Mapped, Session, mapped_column

from monitor.model.timefmt import iso_utc
from monitor.store.audit import Actor, record
from monitor.store.models import Base, BigId, UTCDateTime


class OutOfService(Base):
    """One period of planned work on a machine (``point_id`` None) or one of its points."""

    __tablename__ = "out_of_service"
    __table_args__ = (Index(None, "ended_at", "machine_id"),)

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    machine_id: Mapped[str] = mapped_column(String(64), ForeignKey("machines.id"))
    point_id: Mapped[str | None] = mapped_column(String(64))
    since: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    until: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    put_by: Mapped[str] = mapped_column(String(100))
    comment: Mapped[str] = mapped_column(Text)
    ended_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    ended_by: Mapped[str | None] = mapped_column(String(100))


def lasting(now: dt.datetime) -> list:
    """The SQL conditions of a period lasting at ``now``: begun, not returned, not past its
    ``until``."""
    return [OutOfService.since <= now, OutOfService.ended_at.is_(None),
            or_(OutOfService.until.is_(None), OutOfService.until > now)]


def covers(row: OutOfService, machine: str, point: str | None, now: dt.datetime) -> bool:
    """Whether period ``row`` covers a reading of ``machine``/``point`` taken at ``now``
    (a machine-wide period covers every point; ``point`` None: the machine itself)."""
    if row.machine_id != machine or row.ended_at is not None or row.since > now:
        return False
    if row.until is not None and row.until <= now:
        return False
    return row.point_id is None or row.point_id == point


def out_of_service_json(row: OutOfService) -> dict:
    """A period in the JSON shape of the REST API (docs/api.md, "Out of service")."""
    return {"id": row.id, "machine": row.machine_id, "point": row.point_id,
            "since": iso_utc(row.since), "until": iso_utc(row.until), "by": row.put_by,
            "comment": row.comment, "ended_at": iso_utc(row.ended_at), "ended_by": row.ended_by}


def put_out_of_service(session: Session, by: Actor, machine: str, point: str | None, comment: str,
                       until: dt.datetime | None, now: dt.datetime) -> OutOfService:
    """Start a period of planned work on ``machine`` (or its ``point``) at ``now``, with its
    audit row; the caller has checked the machine, the point, the comment and ``until``.
    A period lasting already for the same machine and point is returned unchanged
    (ValueError if it was started with another comment or end: one period at a time)."""
    same = session.scalars(select(OutOfService).where(
        OutOfService.machine_id == machine,
        OutOfService.point_id.is_(None) if point is None else OutOfService.point_id == point,
        *lasting(now))).first()
    if same is not None:
        if same.comment == comment and same.until == until:
            return same
        what = f"point {point!r} of machine {machine!r}" if point else f"machine {machine!r}"
        raise ValueError(f"{what} is out of service already since {iso_utc(same.since)}; "
                         "return it to service first.")
    row = OutOfService(machine_id=machine, point_id=point, since=now, until=until, put_by=by.name[:100],
                       comment=comment)
    session.add(row)
    session.flush()
    record(session, by, "out_of_service", _target(machine, point),
           {"id": row.id, "comment": comment, "until": iso_utc(until)})
    return row


def return_to_service(session: Session, by: Actor, machine: str, point: str | None,
                      now: dt.datetime) -> list[OutOfService]:
    """End at ``now`` the lasting periods of ``machine`` (``point`` None: every period of
    the machine, its points' too; else that point's), each with its audit row; the periods
    ended (none when nothing was out of service)."""
    q = select(OutOfService).where(OutOfService.machine_id == machine, *lasting(now))
    if point is not None:
        q = q.where(OutOfService.point_id == point)
    rows = list(session.scalars(q.order_by(OutOfService.id)))
    for row in rows:
        row.ended_at = now
        row.ended_by = by.name[:100]
        record(session, by, "return_to_service", _target(machine, row.point_id), {"id": row.id})
    session.flush()
    return rows


def _target(machine: str, point: str | None) -> str:
    return machine if point is None else f"{machine}/{point}"
