"""Shelving alarms and putting equipment out of service (ISA-18.2 / IEC 62682 terms):
the forms of the alarm and machine pages, their JSON API routes, and the banner of the
planned work lasting that every page shows.

Each write needs the engineer role and a comment; the store writes the change and its
audit row (monitor/store/shelving.py, monitor/store/out_of_service.py) and the request
commits. A refusal is one sentence: 400 for a blank comment or a time in the past or
beyond ``MAX_SHELVE_HOURS``, 403 below the engineer role, 404 for an unknown alarm,
machine or point, 409 when the alarm or machine is not in a state the change applies to.
"""

from __future__ import annotations

import datetime as dt
import re
from typing import Any

from flask import Blueprint, current_app, flash, jsonify, redirect, request, url_for

from dashboard.alarms import MAX_COMMENT, parse_time
from dashboard.db import db_session, machine_or_404
from dashboard.errors import BadRequest, Conflict, NotFound
from dashboard.redirects import same_origin_path
from dashboard.security import actor, current, require
from monitor.model.timefmt import time_zone
from monitor.store import reads
from monitor.store.models import Alarm, Machine, utcnow
from monitor.store.out_of_service import (
    OutOfService,
    out_of_service_json,
    put_out_of_service,
    return_to_service,
)
from monitor.store.shelving import is_suppressed, shelve_alarm, unshelve_alarm

bp = Blueprint("shelving", __name__)
api_bp = Blueprint("shelving_api", __name__, url_prefix="/api/v1")

#: A time as a datetime-local form field sends it, in the plant's time zone.
LOCAL_TIME = re.compile(r"[0-9]{4}-[0-9]{2}-[0-9]{2}T[0-9]{2}:[0-9]{2}(:[0-9]{2})?")


# ----------------------------------------------------------------------------- checks


def check_comment(comment: Any, what: str) -> str:
    """The comment without surrounding white space; BadRequest naming the field when it is
    not text, blank or longer than :data:`~dashboard.alarms.MAX_COMMENT` characters."""
    if not isinstance(comment, str):
        raise BadRequest("Field 'comment' must be a string.")
    text = comment.strip()
    if not text:
        raise BadRequest(f"Field 'comment' is required: say why {what}.")
    if len(text) > MAX_COMMENT:
        raise BadRequest(f"Field 'comment' must be at most {MAX_COMMENT} characters.")
    return text


def read_until(value: Any, *, local: bool) -> dt.datetime | None:
    """Field ``until`` as an aware UTC time, None when absent or empty: RFC 3339 or epoch
    seconds (the API, :func:`dashboard.alarms.parse_time`), or a form's
    ``YYYY-MM-DDTHH:MM`` in the plant's time zone (``local``)."""
    if value is None or (local and value == ""):
        return None
    if not isinstance(value, str) or not value:
        raise BadRequest("Field 'until' must be a date-time string such as 2026-12-05T06:00:00Z.")
    if local and LOCAL_TIME.fullmatch(value):
        try:
            naive = dt.datetime.fromisoformat(value)
        except ValueError:
            raise BadRequest(f"Field 'until' is no valid date and time: {value!r}.") from None
        return naive.replace(tzinfo=time_zone(current_app.config["TIME_ZONE"])).astimezone(dt.UTC)
    return parse_time(value, "until")


def check_future(until: dt.datetime, now: dt.datetime, max_hours: float | None) -> dt.datetime:
    """``until`` when it lies after ``now`` and, with ``max_hours``, at most that far
    ahead; BadRequest naming the field otherwise."""
    if until <= now:
        raise BadRequest(f"Field 'until' must lie in the future; {until.isoformat()} has passed.")
    if max_hours is not None and until - now > dt.timedelta(hours=max_hours):
        raise BadRequest(f"Field 'until' must be at most {max_hours:g} hours ahead (the longest shelving "
                         "allowed, alarms.max_shelve_hours).")
    return until


# ----------------------------------------------------------------------------- actions


def do_shelve(alarm_id: int, until_value: Any, comment: Any, *, local: bool = False) -> Alarm:
    """Shelve alarm ``alarm_id`` until ``until_value`` with ``comment`` for the signed-in
    engineer, and commit (checks first, nothing stored on a refusal)."""
    text = check_comment(comment, "the alarm is shelved")
    until = read_until(until_value, local=local)
    if until is None:
        raise BadRequest("Field 'until' is required: the time the alarm comes back by itself.")
    now = utcnow()
    check_future(until, now, float(current_app.config["MAX_SHELVE_HOURS"]))
    s = db_session()
    a = s.get(Alarm, alarm_id)
    if a is None:
        raise NotFound(f"No alarm with id {alarm_id}.")
    if a.state == "cleared":
        raise Conflict(f"Alarm {alarm_id} is cleared; only an active or acknowledged alarm can be shelved.")
    shelve_alarm(s, actor(), a, until, text, now)
    s.commit()
    return a


def do_unshelve(alarm_id: int) -> Alarm:
    """End the shelving of alarm ``alarm_id`` now for the signed-in engineer, and commit."""
    s = db_session()
    a = s.get(Alarm, alarm_id)
    if a is None:
        raise NotFound(f"No alarm with id {alarm_id}.")
    now = utcnow()
    if not is_suppressed(a, now):
        raise Conflict(f"Alarm {alarm_id} is not shelved.")
    unshelve_alarm(s, actor(), a, now)
    s.commit()
    return a


def _machine(machine_id: str, point: Any) -> tuple[Machine, str | None]:
    m = machine_or_404(machine_id)
    if point is None or point == "":
        return m, None
    if not isinstance(point, str):
        raise BadRequest("Field 'point' must be a point id (a string) or left out.")
    if point not in {p.id for p in m.points}:
        raise NotFound(f"Machine {m.id!r} has no point {point!r}.")
    return m, point


def do_out_of_service(machine_id: str, point: Any, comment: Any, until_value: Any, *,
                      local: bool = False) -> OutOfService:
    """Put machine ``machine_id`` (or its ``point``) out of service now, optionally until a
    time, with ``comment``, for the signed-in engineer, and commit."""
    text = check_comment(comment, "it is taken out of service")
    m, pid = _machine(machine_id, point)
    now = utcnow()
    until = read_until(until_value, local=local)
    if until is not None:
        check_future(until, now, None)
    s = db_session()
    try:
        row = put_out_of_service(s, actor(), m.id, pid, text, until, now)
    except ValueError as exc:
        raise Conflict(str(exc)) from None
    s.commit()
    return row


def do_return_to_service(machine_id: str, point: Any) -> list[OutOfService]:
    """Return machine ``machine_id`` (every period of it) or its ``point`` to service now,
    for the signed-in engineer, and commit."""
    m, pid = _machine(machine_id, point)
    s = db_session()
    rows = return_to_service(s, actor(), m.id, pid, utcnow())
    if not rows:
        what = f"Point {pid!r} of machine {m.id!r}" if pid else f"Machine {m.id!r}"
        raise Conflict(f"{what} is not out of service.")
    s.commit()
    return rows


# ----------------------------------------------------------------------------- pages


def _back(default: str) -> str:
    back = same_origin_path(request.form.get("back")) or ""
    return back if back.startswith(("/alarms", "/machines", "/")) and back else default


@bp.post("/alarms/<int:alarm_id>/shelve")
@require("engineer")
def shelve_form(alarm_id: int):
    back = _back(url_for("alarms.detail", alarm_id=alarm_id))
    try:
        a = do_shelve(alarm_id, request.form.get("until", ""), request.form.get("comment", ""), local=True)
    except BadRequest as exc:
        flash(exc.message, "error")
        return redirect(back)
    flash(f"Alarm {a.id} shelved.", "ok")
    return redirect(back)


@bp.post("/alarms/<int:alarm_id>/unshelve")
@require("engineer")
def unshelve_form(alarm_id: int):
    a = do_unshelve(alarm_id)
    flash(f"Alarm {a.id} unshelved.", "ok")
    return redirect(_back(url_for("alarms.detail", alarm_id=alarm_id)))


@bp.post("/machines/<machine_id>/out-of-service")
@require("engineer")
def out_of_service_form(machine_id: str):
    back = url_for("machines.detail", machine_id=machine_id)
    try:
        do_out_of_service(machine_id, request.form.get("point"), request.form.get("comment", ""),
                          request.form.get("until"), local=True)
    except BadRequest as exc:
        flash(exc.message, "error")
        return redirect(back)
    flash("Out of service: no alarms are raised and nothing is learnt from it until it returns.", "ok")
    return redirect(back)


@bp.post("/machines/<machine_id>/return-to-service")
@require("engineer")
def return_form(machine_id: str):
    do_return_to_service(machine_id, request.form.get("point"))
    flash("Returned to service: alarms and learning resume.", "ok")
    return redirect(url_for("machines.detail", machine_id=machine_id))


def planned_work_banner() -> dict[str, Any]:
    """Template context of every page: the periods out of service lasting now (for a
    signed-in user; the sign-in page shows none)."""
    if current() is None:
        return {"planned_work": []}
    return {"planned_work": [out_of_service_json(r) for r in reads.lasting_out_of_service(db_session(), utcnow())]}


# ----------------------------------------------------------------------------- API


def _body(allowed: tuple[str, ...]) -> dict:
    data = request.get_json(silent=True) if request.data else {}
    if not isinstance(data, dict):
        raise BadRequest("The request body must be a JSON object (Content-Type: application/json).")
    extra = sorted(set(data) - set(allowed))
    if extra:
        raise BadRequest(f"Unknown field {extra[0]!r}; allowed: {', '.join(allowed)}.")
    return data


@api_bp.post("/alarms/<int:alarm_id>/shelve")
@require("engineer")
def api_shelve(alarm_id: int):
    data = _body(("until", "comment"))
    a = do_shelve(alarm_id, data.get("until"), data.get("comment", ""))
    return jsonify(reads.alarm_json(a))


@api_bp.post("/alarms/<int:alarm_id>/unshelve")
@require("engineer")
def api_unshelve(alarm_id: int):
    _body(())
    return jsonify(reads.alarm_json(do_unshelve(alarm_id)))


@api_bp.get("/out-of-service")
@require("viewer")
def api_planned_work():
    return jsonify({"items": [out_of_service_json(r) for r in reads.lasting_out_of_service(db_session(), utcnow())]})


@api_bp.post("/machines/<machine_id>/out-of-service")
@require("engineer")
def api_out_of_service(machine_id: str):
    data = _body(("point", "comment", "until"))
    row = do_out_of_service(machine_id, data.get("point"), data.get("comment", ""), data.get("until"))
    return jsonify(out_of_service_json(row)), 201


@api_bp.post("/machines/<machine_id>/return-to-service")
@require("engineer")
def api_return_to_service(machine_id: str):
    data = _body(("point",))
    rows = do_return_to_service(machine_id, data.get("point"))
    return jsonify({"items": [out_of_service_json(r) for r in rows]})
