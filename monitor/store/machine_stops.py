"""Stops an engineer announced (table ``machine_stops``): "machine X is stopped from
... until ..." for planned work.

While a stop is announced the service takes the machine's readings as stopped (stored,
flagged, no growth learning and no growth alarm) and raises no stale-stream alarm for its
points (monitor/detection/running.py, docs/alarms.md "Running and stopped"). A stop is
written by the API (``POST /api/v1/machines/{id}/stops``) or the command line
(``whirlwatch machines stop``), and ended early by setting ``ended_at`` (never deleted:
the rows are the record of who announced what). The service reads the stops of the
machines a batch touches in that batch's transaction (:func:`announced_stops`).
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable
from typing import Any, cast

from sqlalchemy import ForeignKey, Index, String, Table, Text, exists, select
from sqlalchemy.orm import Mapped, Session, mapped_column

from monitor.model.timefmt import iso_utc
from monitor.store.models import Base, BigId, MachineStatus, UTCDateTime, utcnow

#: Longest stop that may be announced, days: a stop longer than a quarter is a machine
#: out of service, not a planned stop (our choice).
MAX_STOP_DAYS = 92.0
#: Longest comment, characters.
MAX_COMMENT = 500


class MachineStop(Base):
    """One announced stop of a machine: from ``starts_at`` until ``ends_at`` (excluded),
    who announced it and why; ``ended_at`` when it was ended early."""

    __tablename__ = "machine_stops"
    __table_args__ = (Index(None, "machine_id", "ends_at"),)

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    machine_id: Mapped[str] = mapped_column(String(64), ForeignKey("machines.id", ondelete="CASCADE"))
    starts_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    ends_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    comment: Mapped[str] = mapped_column(Text)
    announced_by: Mapped[str] = mapped_column(String(100))
    announced_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    ended_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    ended_by: Mapped[str | None] = mapped_column(String(100))


class StopTimesError(ValueError):
    """The times of a stop do not fit (not ahead of now, too far ahead, too long)."""


#: How far ahead a stop may be announced, days (our choice).
MAX_AHEAD_DAYS = 365.0


def check_stop(starts_at: dt.datetime, ends_at: dt.datetime, comment: str, now: dt.datetime) -> None:
    """ValueError, one sentence naming the field, for a stop that cannot be announced at
    ``now``: a comment is required, 'until' must be after 'from' and after now, 'from' at
    most :data:`MAX_AHEAD_DAYS` ahead, and the stop at most :data:`MAX_STOP_DAYS` long."""
    if not isinstance(comment, str) or not comment.strip():
        raise ValueError("'comment' is required: say why the machine is stopped.")
    if len(comment) > MAX_COMMENT:
        raise ValueError(f"'comment' must be at most {MAX_COMMENT} characters, got {len(comment)}.")
    if not ends_at > starts_at:
        raise StopTimesError(f"'until' ({iso_utc(ends_at.timestamp())}) must be after 'from' "
                         f"({iso_utc(starts_at.timestamp())}).")
    if not ends_at > now:
        raise StopTimesError(f"'until' ({iso_utc(ends_at.timestamp())}) must be in the future.")
    if starts_at - now > dt.timedelta(days=MAX_AHEAD_DAYS):
        raise StopTimesError(f"'from' may be at most {MAX_AHEAD_DAYS:g} days ahead, got "
                         f"{iso_utc(starts_at.timestamp())}.")
    if ends_at - starts_at > dt.timedelta(days=MAX_STOP_DAYS):
        raise StopTimesError(f"a stop may last at most {MAX_STOP_DAYS:g} days; put the machine out of "
                         "service for longer work.")


def announce_stop(s: Session, machine_id: str, starts_at: dt.datetime, ends_at: dt.datetime,
                  comment: str, user: str) -> MachineStop:
    """Record an announced stop (inside the caller's transaction); ValueError naming the
    field for bad values (:func:`check_stop`). The caller checks the machine exists."""
    now = utcnow()
    check_stop(starts_at, ends_at, comment, now)
    row = MachineStop(machine_id=machine_id, starts_at=starts_at, ends_at=ends_at, comment=comment.strip(),
                      announced_by=user[:100], announced_at=now)
    s.add(row)
    s.flush()
    return row


def end_stop(s: Session, row: MachineStop, user: str, at: dt.datetime | None = None) -> MachineStop:
    """End an announced stop now (or at ``at``): the machine counts as running again from
    its readings. A stop ended already is left as it is."""
    if row.ended_at is None:
        when = at or utcnow()
        row.ended_at = when
        row.ended_by = user[:100]
        if row.ends_at > when:
            row.ends_at = max(when, row.starts_at)
    return row


def get_stop(s: Session, machine_id: str, stop_id: int) -> MachineStop | None:
    row = s.get(MachineStop, stop_id)
    return row if row is not None and row.machine_id == machine_id else None


def machine_stops(s: Session, machine_id: str, *, current_after: dt.datetime | None = None,
                  limit: int = 50) -> list[MachineStop]:
    """The machine's announced stops, newest start first; with ``current_after`` only those
    not over by then."""
    q = select(MachineStop).where(MachineStop.machine_id == machine_id)
    if current_after is not None:
        q = q.where(MachineStop.ends_at > current_after)
    return list(s.scalars(q.order_by(MachineStop.starts_at.desc(), MachineStop.id.desc()).limit(limit)))


def announced_stops(db: Any, machines: Iterable[str], after: float) -> dict[str, list[tuple[float, float]]]:
    """``{machine: [(start, until), ...]}`` (epoch s) of the stops of ``machines`` not over
    at ``after`` (epoch s): one query (``db`` a session or a connection)."""
    ids = sorted(set(machines))
    if not ids:
        return {}
    t = cast(Table, MachineStop.__table__)
    since = dt.datetime.fromtimestamp(after, dt.UTC)
    rows = db.execute(select(t.c.machine_id, t.c.starts_at, t.c.ends_at)
                      .where(t.c.machine_id.in_(ids), t.c.ends_at > since)).all()
    out: dict[str, list[tuple[float, float]]] = {}
    for mid, start, until in rows:
        out.setdefault(mid, []).append((_epoch(start), _epoch(until)))
    return out


def stop_in_force(machine_id: Any, now: dt.datetime) -> Any:
    """An SQL ``EXISTS`` for a stop of ``machine_id`` (a column or a value) announced at
    ``now``: the overview asks it in the statement that reads its page."""
    return exists().where(MachineStop.machine_id == machine_id, MachineStop.starts_at <= now,
                          MachineStop.ends_at > now)


def running_json(s: Session, machine_id: str) -> dict[str, Any]:
    """Running or stopped for the machine page and ``GET /api/v1/machines/{id}``: the
    service's latest judgement (its retained status), stopped while an announced stop is
    in force, and the stops not over yet."""
    body = s.scalar(select(MachineStatus.status).where(MachineStatus.machine_id == machine_id))
    r = (body or {}).get("running") or {}
    now = utcnow()
    stops = [stop_json(x, now) for x in machine_stops(s, machine_id, current_after=now, limit=10)]
    announced = any(x["current"] for x in stops)
    return {"state": "stopped" if announced else r.get("state"),
            "reason": "stop announced" if announced else r.get("reason"), "at": r.get("at"),
            "stop_announced": announced, "stops": stops}


def _epoch(value: dt.datetime) -> float:
    # A Core select on SQLite gives the column type's aware UTC datetime too.
    return (value if value.tzinfo else value.replace(tzinfo=dt.UTC)).timestamp()


def stop_json(row: MachineStop, now: dt.datetime | None = None) -> dict[str, Any]:
    """The API's JSON of an announced stop (dashboard/openapi.json ``MachineStop``)."""
    at = now or utcnow()
    return {"id": row.id, "machine": row.machine_id, "from": iso_utc(row.starts_at.timestamp()),
            "until": iso_utc(row.ends_at.timestamp()), "comment": row.comment,
            "announced_by": row.announced_by, "announced_at": iso_utc(row.announced_at.timestamp()),
            "ended_at": None if row.ended_at is None else iso_utc(row.ended_at.timestamp()),
            "ended_by": row.ended_by, "current": row.starts_at <= at < row.ends_at}
