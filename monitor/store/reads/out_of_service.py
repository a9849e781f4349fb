"""Reads of planned work: the periods out of service lasting at a time (the service's
batches and stale check, every dashboard page's banner) and a machine's recent periods
(monitor/store/out_of_service.py)."""

from __future__ import annotations

import datetime as dt
from collections.abc import Collection

from sqlalchemy import Connection, select
from sqlalchemy.orm import Session

from monitor.store.out_of_service import OutOfService, lasting

#: The most periods a page lists (a plant rarely has more out of service at once).
MAX_LISTED = 200


def lasting_out_of_service(s: Session, now: dt.datetime,
                           machines: Collection[str] | None = None) -> list[OutOfService]:
    """The periods out of service lasting at ``now`` (of ``machines`` when given), by
    machine then point, at most :data:`MAX_LISTED`; one statement."""
    q = select(OutOfService).where(*lasting(now))
    if machines is not None:
        q = q.where(OutOfService.machine_id.in_(sorted(machines)))
    q = q.order_by(OutOfService.machine_id, OutOfService.point_id, OutOfService.id).limit(MAX_LISTED)
    return list(s.scalars(q))


def out_of_service_marks(db: Session | Connection, now: dt.datetime,
                         machines: Collection[str]) -> dict[str, list[str | None]]:
    """What of ``machines`` is out of service at ``now``: per machine, the point ids of its
    lasting periods (None for the whole machine); one statement (on a Session or the
    service's Connection)."""
    if not machines:
        return {}
    rows = db.execute(select(OutOfService.machine_id, OutOfService.point_id)
                      .where(*lasting(now), OutOfService.machine_id.in_(sorted(machines)))
                      .order_by(OutOfService.machine_id, OutOfService.point_id))
    out: dict[str, list[str | None]] = {}
    for machine, point in rows:
        out.setdefault(machine, []).append(point)
    return out


def machine_periods(s: Session, machine: str, limit: int = 20) -> list[OutOfService]:
    """The latest periods of ``machine`` (lasting or ended), newest first."""
    return list(s.scalars(select(OutOfService).where(OutOfService.machine_id == machine)
                          .order_by(OutOfService.id.desc()).limit(limit)))
