"""Announced stops of a machine in the JSON API under /api/v1 (dashboard/openapi.json):
an engineer says a machine is stopped for planned work from ... until ..., lists the
stops and ends one early (monitor/store/machine_stops.py). While a stop is announced the
service takes the machine's readings as stopped and raises no stale-stream alarm
(docs/alarms.md, "Running and stopped")."""

from __future__ import annotations

import datetime as dt

from flask import Blueprint, jsonify, request

from dashboard.alarms import acting_user, parse_time
from dashboard.db import db_session, machine_or_404
from dashboard.errors import BadRequest, Conflict, NotFound
from dashboard.security import require
from monitor.store.machine_stops import (
    StopTimesError,
    announce_stop,
    end_stop,
    get_stop,
    machine_stops,
    stop_json,
)
from monitor.store.models import utcnow

bp = Blueprint("stops_api", __name__, url_prefix="/api/v1")

#: Stops listed per machine, newest first.
STOP_LIST = 50



def _time_field(data: dict, name: str, required: bool) -> dt.datetime | None:
    value = data.get(name)
    if value is not None and not isinstance(value, str):
        raise BadRequest(f"Field {name!r} must be an ISO 8601 time (string), got {type(value).__name__}.")
    when = parse_time(value, name)
    if when is None and required:
        raise BadRequest(f"Field {name!r} is required: an ISO 8601 time.")
    return when


@bp.get("/machines/<machine_id>/stops")
@require("viewer")
def list_stops(machine_id: str):
    """The machine's announced stops, newest first (``current=true``: those not over)."""
    m = machine_or_404(machine_id)
    current = request.args.get("current", "false")
    if current not in ("true", "false"):
        raise BadRequest(f"Parameter 'current' must be true or false, got {current!r}.")
    now = utcnow()
    rows = machine_stops(db_session(), m.id, current_after=now if current == "true" else None, limit=STOP_LIST)
    return jsonify({"items": [stop_json(r, now) for r in rows], "next": None})


@bp.post("/machines/<machine_id>/stops")
@require("engineer")
def announce(machine_id: str):
    """Announce a planned stop: ``{"from"?, "until", "comment"}``."""
    m = machine_or_404(machine_id)
    data = request.get_json(silent=True)
    if not isinstance(data, dict):
        raise BadRequest("The request body must be a JSON object (Content-Type: application/json).")
    extra = sorted(set(data) - {"from", "until", "comment"})
    if extra:
        raise BadRequest(f"Unknown field {extra[0]!r}; allowed: from, until, comment.")
    start = _time_field(data, "from", required=False) or utcnow()
    until = _time_field(data, "until", required=True) or utcnow()
    comment = data.get("comment")
    if not isinstance(comment, str):
        raise BadRequest("Field 'comment' is required: say why the machine is stopped.")
    s = db_session()
    try:
        row = announce_stop(s, m.id, start, until, comment, acting_user())
    except StopTimesError as exc:
        raise Conflict(str(exc)) from None
    except ValueError as exc:
        raise BadRequest(str(exc)) from None
    s.commit()
    return jsonify(stop_json(row)), 201


@bp.post("/machines/<machine_id>/stops/<int:stop_id>/end")
@require("engineer")
def end(machine_id: str, stop_id: int):
    """End an announced stop now (a stop over already is returned as it is)."""
    m = machine_or_404(machine_id)
    s = db_session()
    row = get_stop(s, m.id, stop_id)
    if row is None:
        raise NotFound(f"Machine {m.id!r} has no announced stop with id {stop_id}.")
    end_stop(s, row, acting_user())
    s.commit()
    return jsonify(stop_json(row))
