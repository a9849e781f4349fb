"""JSON API under /api/v1 (described by dashboard/openapi.json, served at /api/v1/openapi.json).

Reads need a session or an API token; writes need the engineer role. Lists come as
``{"items": [...], "next": ...}``; errors in the fixed shape of :mod:`dashboard.errors`.
"""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

from flask import Blueprint, Response, jsonify, request

from dashboard.alarms import (
    acting_user,
    do_acknowledge,
    parse_filters,
    parse_page,
    time_span,
)
from dashboard.db import db_session, machine_or_404
from dashboard.errors import BadRequest, Conflict, NotFound
from dashboard.machines import decide_candidate
from dashboard.overview import parse_overview
from dashboard.security import require
from monitor.model.registry import RegistryError
from monitor.model.registry_file import parse_mode
from monitor.model.timefmt import iso_utc
from monitor.store import reads
from monitor.store.models import Machine, Mode
from monitor.store.registry_sync import UnknownEntry, request_baseline_restart, save_mode

bp = Blueprint("api", __name__, url_prefix="/api/v1")

OPENAPI_PATH = Path(__file__).with_name("openapi.json")
MAX_TREND_POINTS = 5000
DEFAULT_TREND_POINTS = 500
DEFAULT_TREND_SPAN = dt.timedelta(days=7)
#: Passages per page by default (each carries its sweep's Bode points).
DEFAULT_PASSAGE_PAGE = 20



def _body() -> dict:
    data = request.get_json(silent=True)
    if not isinstance(data, dict):
        raise BadRequest("The request body must be a JSON object (Content-Type: application/json).")
    return data


@bp.get("/openapi.json")
def openapi():
    # Public like any API description; it holds no plant data.
    return Response(OPENAPI_PATH.read_bytes(), mimetype="application/json")


@bp.get("/machines")
@require("viewer")
def machines():
    """A page of the overview: filtered, sorted and cut in the database, each machine
    with the retained status the service stored (monitor/store/reads/overview.py)."""
    page = reads.overview_page(db_session(), parse_overview(request.args))
    page["next"] = None if page["next"] is None else str(page["next"])
    return jsonify(page)


@bp.get("/machines/<machine_id>")
@require("viewer")
def machine(machine_id: str):
    return jsonify(reads.machine_detail(db_session(), machine_or_404(machine_id)))


@bp.get("/machines/<machine_id>/trends")
@require("viewer")
def machine_trends(machine_id: str):
    m = machine_or_404(machine_id)
    t0, t1 = time_span(request.args, DEFAULT_TREND_SPAN)
    try:
        n = int(request.args.get("max_points", DEFAULT_TREND_POINTS))
    except ValueError:
        raise BadRequest(f"Parameter 'max_points' must be an integer 2-{MAX_TREND_POINTS}.") from None
    if not 2 <= n <= MAX_TREND_POINTS:
        raise BadRequest(f"Parameter 'max_points' must be an integer 2-{MAX_TREND_POINTS}, got {n}.")
    known = [p.id for p in m.points if p.active]
    wanted = request.args.getlist("point") or known
    unknown = [p for p in wanted if p not in known]
    if unknown:
        raise NotFound(f"Machine {m.id!r} has no measurement point {unknown[0]!r}.")
    return jsonify({
        "machine": m.id, "from": iso_utc(t0), "to": iso_utc(t1), "max_points": n,
        "points": reads.trends(db_session(), m, wanted, t0, t1, n),
        "speed": reads.speed_trend(db_session(), m, t0, t1, n),
    })


@bp.get("/machines/<machine_id>/modes")
@require("viewer")
def machine_modes(machine_id: str):
    m = machine_or_404(machine_id)
    s = db_session()
    return jsonify({"items": [reads.mode_json(x) for x in reads.machine_modes(s, m.id)], "next": None,
                    "history": reads.mode_history(s, m.id)})


def _parse_mode_body(m: Machine, data: dict, base: Mode | None):
    raw = dict(base.values()) if base is not None else {}
    allowed = ("name", "frequency_hz", "damping_ratio", "amplification_factor",
               "required_margin_pct", "source", "date")
    extra = sorted(set(data) - set(allowed))
    if extra:
        raise BadRequest(f"Unknown field {extra[0]!r}; allowed: {', '.join(allowed)}.")
    raw.update(data)
    # Damping ratio and amplification factor are alternatives: a new one replaces the old.
    for given, other in (("damping_ratio", "amplification_factor"), ("amplification_factor", "damping_ratio")):
        if data.get(given) is not None and other not in data:
            raw.pop(other, None)
    # null leaves an optional value out; any other value is checked as given.
    raw = {k: v for k, v in raw.items() if v is not None}
    try:
        return parse_mode(raw, m.id)
    except RegistryError as exc:
        raise BadRequest(str(exc)) from None


def _name_clash(m: Machine, name: str, except_id: int | None) -> None:
    other = reads.mode_named(db_session(), m.id, name)
    if other is not None and other.id != except_id:
        raise Conflict(f"Machine {m.id!r} already has a mode named {name!r}.")


@bp.post("/machines/<machine_id>/modes")
@require("engineer")
def create_mode(machine_id: str):
    m = machine_or_404(machine_id)
    values = _parse_mode_body(m, _body(), None)
    _name_clash(m, values.name, None)
    s = db_session()
    mode = save_mode(s, m, values, acting_user(), None)
    s.commit()
    return jsonify(reads.mode_json(mode)), 201


@bp.put("/machines/<machine_id>/modes/<int:mode_id>")
@require("engineer")
def update_mode(machine_id: str, mode_id: int):
    m = machine_or_404(machine_id)
    mode = db_session().get(Mode, mode_id)
    if mode is None or mode.machine_id != m.id:
        raise NotFound(f"Machine {m.id!r} has no mode with id {mode_id}.")
    values = _parse_mode_body(m, _body(), mode)
    _name_clash(m, values.name, mode.id)
    s = db_session()
    mode = save_mode(s, m, values, acting_user(), mode)
    s.commit()
    return jsonify(reads.mode_json(mode))


@bp.post("/machines/<machine_id>/baseline")
@require("engineer")
def restart_baseline(machine_id: str):
    """Ask the service to learn the baselines of a point (or every point) again."""
    machine_or_404(machine_id)
    data = _body()
    extra = sorted(set(data) - {"point", "comment"})
    if extra:
        raise BadRequest(f"Unknown field {extra[0]!r}; allowed: point, comment.")
    point = data.get("point")
    if point is not None and not isinstance(point, str):
        raise BadRequest("Field 'point' must be a point id (string) or null for every point.")
    comment = data.get("comment")
    if not isinstance(comment, str) or not comment.strip():
        raise BadRequest("Field 'comment' is required: say why the baseline is restarted.")
    s = db_session()
    try:
        req = request_baseline_restart(s, machine_id, point, comment, acting_user())
    except UnknownEntry as exc:
        raise NotFound(str(exc)) from None
    except RegistryError as exc:
        raise BadRequest(str(exc)) from None
    s.commit()
    return jsonify(reads.baseline_restart_json(req)), 202


@bp.get("/machines/<machine_id>/passages")
@require("viewer")
def machine_passages(machine_id: str):
    m = machine_or_404(machine_id)
    limit, cursor = parse_page(request.args, DEFAULT_PASSAGE_PAGE)
    rows, nxt = reads.find_passages(db_session(), m.id, before_id=cursor, limit=limit)
    return jsonify({"items": [reads.passage_json(p) for p in rows],
                    "next": None if nxt is None else str(nxt)})


@bp.post("/machines/<machine_id>/candidates/<int:passage_id>/accept")
@require("engineer")
def accept_candidate(machine_id: str, passage_id: int):
    """Make a candidate mode a registry mode (body: optional ``{"name": ...}``)."""
    data = request.get_json(silent=True) if request.data else {}
    if not isinstance(data, dict):
        raise BadRequest("The request body must be a JSON object such as {\"name\": \"...\"}.")
    extra = sorted(set(data) - {"name"})
    if extra:
        raise BadRequest(f"Unknown field {extra[0]!r}; allowed: name.")
    name = data.get("name")
    if name is not None and not isinstance(name, str):
        raise BadRequest("Field 'name' must be a string (the new mode's name) or left out.")
    p = decide_candidate(machine_id, passage_id, accept=True, name=name)
    return jsonify(reads.passage_json(p, with_points=False))


@bp.post("/machines/<machine_id>/candidates/<int:passage_id>/reject")
@require("engineer")
def reject_candidate(machine_id: str, passage_id: int):
    p = decide_candidate(machine_id, passage_id, accept=False)
    return jsonify(reads.passage_json(p, with_points=False))


@bp.get("/alarms")
@require("viewer")
def alarms():
    f = parse_filters(request.args)
    limit, cursor = parse_page(request.args)
    rows, nxt = reads.find_alarms(db_session(), **f, before_id=cursor, limit=limit)
    return jsonify({"items": [reads.alarm_json(a) for a in rows],
                    "next": None if nxt is None else str(nxt)})


@bp.get("/alarms/<int:alarm_id>")
@require("viewer")
def alarm(alarm_id: int):
    a = reads.get_alarm(db_session(), alarm_id)
    if a is None:
        raise NotFound(f"No alarm with id {alarm_id}.")
    return jsonify({**reads.alarm_json(a, with_transitions=True),
                    "notifications": reads.alarm_deliveries(db_session(), alarm_id)})


@bp.post("/alarms/<int:alarm_id>/acknowledge")
@require("engineer")
def acknowledge(alarm_id: int):
    data = request.get_json(silent=True) if request.data else {}
    if not isinstance(data, dict):
        raise BadRequest("The request body must be a JSON object such as {\"comment\": \"...\"}.")
    extra = sorted(set(data) - {"comment"})
    if extra:
        raise BadRequest(f"Unknown field {extra[0]!r}; allowed: comment.")
    comment = data.get("comment", "")
    if not isinstance(comment, str):
        raise BadRequest("Field 'comment' must be a string.")
    a = do_acknowledge(alarm_id, comment)
    return jsonify(reads.alarm_json(a))


@bp.get("/spectra/<int:spectrum_id>")
@require("viewer")
def spectrum(spectrum_id: int):
    sn = reads.get_spectrum(db_session(), spectrum_id)
    if sn is None:
        raise NotFound(f"No stored spectrum with id {spectrum_id}.")
    return jsonify(reads.spectrum_json(sn, speed_hz=reads.reading_speeds(db_session(), [sn])[sn.id]))


def openapi_document() -> dict:
    return json.loads(OPENAPI_PATH.read_text())
