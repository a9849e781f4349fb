"""Shelving an alarm: an engineer sets it aside until a time, with a comment.

ISA-18.2 and IEC 62682 (alarm management) call this *shelving*: a manual, temporary
suppression of an alarm the operator knows about, always time-limited. Here:

- an alarm not cleared is shelved until a time in the future, at most
  ``alarms.max_shelve_hours`` ahead (the dashboard and the API check it), with a comment
  (a transition ``shelved`` records who, why and until when);
- it stays in the store and keeps every transition; those recorded while it is shelved
  carry ``shelved`` (monitor/store/writes.py); nothing is sent for them
  (:func:`is_suppressed`, the one predicate the notifications use);
- a new raise of the same alarm (machine, point, kind, subject) while the shelf lasts is
  shelved as well (ISA-18.2 shelves the alarm, not one occurrence of it);
- it unshelves by itself once the time passes: :func:`is_suppressed` is false from that
  instant, whoever asks, and the service's periodic job records the ``unshelved``
  transition (:func:`unshelve_due`, monitor/service/suppression.py); an engineer may
  unshelve it earlier (:func:`unshelve_alarm`).

Writes run inside the caller's transaction and add their audit rows there.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from monitor.model.timefmt import iso_utc, parse_iso_utc
from monitor.store.audit import Actor, record
from monitor.store.models import Alarm, AlarmTransitionRow

#: Why the service unshelved an alarm (the ``unshelved`` transition's evidence).
SHELF_EXPIRED = "shelving time over"


def is_suppressed(alarm: Alarm | Mapping[str, Any], now: dt.datetime) -> bool:
    """Whether ``alarm`` (a store row, or its JSON: the REST shape or an MQTT alarm event)
    is shelved at ``now`` (aware UTC): its ``shelved_until`` lies after ``now``. The one
    rule for whether an alarm's transitions are notified (docs/alarms.md, "Shelving and out
    of service")."""
    until = alarm.get("shelved_until") if isinstance(alarm, Mapping) else alarm.shelved_until
    if isinstance(until, str):
        until = parse_iso_utc(until)
    return until is not None and until > now


def shelf_json(alarm: Alarm, now: dt.datetime) -> dict[str, Any]:
    """The shelving fields of an alarm's JSON (docs/schemas/alarm.json)."""
    on = is_suppressed(alarm, now)
    return {"shelved": on, "shelved_until": iso_utc(alarm.shelved_until) if on else None,
            "shelved_by": alarm.shelved_by if on else None, "shelve_comment": alarm.shelve_comment if on else None}


def shelve_alarm(session: Session, by: Actor, alarm: Alarm, until: dt.datetime, comment: str,
                 now: dt.datetime) -> Alarm:
    """Shelve ``alarm`` (not cleared) until ``until`` with ``comment``, at ``now``: its
    fields, a ``shelved`` transition and an audit row. The caller has checked the comment
    and that ``until`` lies after ``now`` within the maximum."""
    alarm.shelved_until = until
    alarm.shelved_by = by.name[:100]
    alarm.shelve_comment = comment
    _step(session, alarm, "shelved", now, by.name, {"comment": comment, "until": iso_utc(until)})
    record(session, by, "alarm_shelve", str(alarm.id), {"until": iso_utc(until), "comment": comment})
    return alarm


def unshelve_alarm(session: Session, by: Actor | None, alarm: Alarm, now: dt.datetime) -> Alarm:
    """End the shelving of ``alarm`` at ``now``: an ``unshelved`` transition, and an audit row
    for an engineer's action (``by``; None: the shelving time ran out, the service's job)."""
    alarm.shelved_until = None
    if by is None:
        _step(session, alarm, "unshelved", now, None, {"reason": SHELF_EXPIRED})
        return alarm
    _step(session, alarm, "unshelved", now, by.name, {"reason": "unshelved by an engineer"})
    record(session, by, "alarm_unshelve", str(alarm.id), {})
    return alarm


def unshelve_due(session: Session, now: dt.datetime) -> list[int]:
    """Record the end of every shelving whose time has passed by ``now`` (one
    ``unshelved`` transition each, at the time the shelf ended); the alarm ids."""
    rows = session.scalars(select(Alarm).where(Alarm.shelved_until.is_not(None), Alarm.shelved_until <= now)
                           .order_by(Alarm.id)).all()
    for a in rows:
        end = a.shelved_until
        assert end is not None
        unshelve_alarm(session, None, a, end)
    session.flush()
    return [a.id for a in rows]


def inherit_shelf(session: Session, new: Alarm, previous: Alarm | None, at: dt.datetime) -> None:
    """A new alarm row raised at ``at`` while its identity's previous row (``previous``) is
    still shelved takes the same shelf: shelving is of the alarm, not one occurrence."""
    if previous is not None and is_suppressed(previous, at):
        new.shelved_until = previous.shelved_until
        new.shelved_by = previous.shelved_by
        new.shelve_comment = previous.shelve_comment


def _step(session: Session, alarm: Alarm, name: str, at: dt.datetime, user: str | None,
          evidence: dict[str, Any]) -> None:
    # The alarm's state and last (detector) transition stay as they are: shelving is a
    # suppression on top of the alarm's state, not a state of the detector.
    session.add(AlarmTransitionRow(alarm_id=alarm.id, transition=name, severity=alarm.severity,
                                   state=alarm.state, at=at, evidence=evidence, user=user,
                                   shelved=name == "shelved"))
    session.flush()
