"""The evidence views of the JSON API under /api/v1 (dashboard/openapi.json): a point's
stored raw waveforms and one waveform's samples, the bearing envelope spectrum of a
stored waveform with its defect-frequency markers, a point's spectra over a time range (a
waterfall), a point's newest spectrum against the one its baseline was learned from, and
the sweep plots of a passage.

Each view parses, reads through monitor/store/reads, computes with the service's own
analysis (monitor/analysis/envelope_view.py, monitor/modes/sweep_plots.py) and answers.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping

from flask import Blueprint, jsonify, request

from dashboard.alarms import MAX_LIMIT, time_span
from dashboard.db import db_session, machine_or_404
from dashboard.errors import BadRequest, Conflict, NotFound
from dashboard.security import require
from monitor.analysis.envelope_view import envelope_view
from monitor.model import units
from monitor.model.bearing_geometry import BearingGeometry
from monitor.model.timefmt import iso_utc
from monitor.modes.sweep_plots import sweep_plot
from monitor.store import reads
from monitor.store.models import Machine

bp = Blueprint("evidence_api", __name__, url_prefix="/api/v1")

#: The spectrum kinds a waterfall or a comparison draws (docs/store.md).
KINDS = ("velocity", "native", "envelope")
DEFAULT_SPAN = dt.timedelta(days=7)
MAX_WATERFALL_ROWS = 200
DEFAULT_WATERFALL_ROWS = 40
MAX_WAVEFORM_LIST = MAX_LIMIT
DEFAULT_WAVEFORM_LIST = 100



def _point(m: Machine, args: Mapping[str, str], *, required: bool) -> str | None:
    """The ``point`` parameter, one of the machine's points (NotFound otherwise)."""
    point = args.get("point") or None
    if point is None:
        if required:
            raise BadRequest("Parameter 'point' is required: the id of one of the machine's points.")
        return None
    if point not in {p.id for p in m.points}:
        raise NotFound(f"Machine {m.id!r} has no measurement point {point!r}.")
    return point


def _kind(args: Mapping[str, str]) -> str:
    kind = args.get("kind") or "velocity"
    if kind not in KINDS:
        raise BadRequest(f"Parameter 'kind' must be one of {', '.join(KINDS)}, got {kind!r}.")
    return kind



def _int(args: Mapping[str, str], name: str, default: int, top: int) -> int:
    raw = args.get(name)
    try:
        v = default if raw in (None, "") else int(raw)
    except ValueError:
        raise BadRequest(f"Parameter '{name}' must be an integer 1-{top}, got {raw!r}.") from None
    if not 1 <= v <= top:
        raise BadRequest(f"Parameter '{name}' must be an integer 1-{top}, got {v}.")
    return v


@bp.get("/machines/<machine_id>/waveforms")
@require("viewer")
def machine_waveforms(machine_id: str):
    m = machine_or_404(machine_id)
    point = _point(m, request.args, required=False)
    t0, t1 = time_span(request.args, DEFAULT_SPAN)
    limit = _int(request.args, "limit", DEFAULT_WAVEFORM_LIST, MAX_WAVEFORM_LIST)
    rows = reads.find_waveforms(db_session(), m.id, point, t0, t1, limit)
    try:
        bearing = BearingGeometry.from_settings(m.settings or {}) is not None
    except ValueError:
        bearing = False
    return jsonify({"items": [reads.waveform_json(w) for w in rows], "next": None, "bearing_geometry": bearing})


def _waveform_or_404(waveform_id: int):
    w = reads.get_waveform(db_session(), waveform_id)
    if w is None:
        raise NotFound(f"No stored waveform with id {waveform_id}.")
    return w


@bp.get("/waveforms/<int:waveform_id>")
@require("viewer")
def waveform(waveform_id: int):
    return jsonify(reads.waveform_json(_waveform_or_404(waveform_id), with_samples=True))


@bp.get("/waveforms/<int:waveform_id>/envelope")
@require("viewer")
def waveform_envelope(waveform_id: int):
    w = _waveform_or_404(waveform_id)
    m = machine_or_404(w.machine_id)
    if units.quantity_of(w.unit) != "acceleration":
        raise Conflict(f"Waveform {w.id} is in {w.unit}: the envelope spectrum needs an acceleration waveform.")
    try:
        geometry = BearingGeometry.from_settings(m.settings or {})
    except ValueError as exc:
        raise Conflict(f"Machine {m.id!r} has an unusable bearing geometry: {exc}") from None
    if geometry is None:
        raise Conflict(f"Machine {m.id!r} has no bearing geometry (docs/registry.md, bearing keys).")
    if w.speed_hz is None:
        raise Conflict(f"Waveform {w.id} has no running speed to place the defect frequencies.")
    try:
        view = envelope_view(w.sample_array(), w.fs_hz, w.unit, w.speed_hz, geometry)
    except ValueError as exc:
        raise Conflict(f"Waveform {w.id}: {exc}") from None
    return jsonify({**reads.waveform_json(w), **view, "waveform": w.id})


@bp.get("/machines/<machine_id>/waterfall")
@require("viewer")
def machine_waterfall(machine_id: str):
    m = machine_or_404(machine_id)
    point = _point(m, request.args, required=True)
    assert point is not None
    t0, t1 = time_span(request.args, DEFAULT_SPAN)
    n = _int(request.args, "max_rows", DEFAULT_WATERFALL_ROWS, MAX_WATERFALL_ROWS)
    bins = _int(request.args, "max_bins", reads.MAX_SPECTRUM_BINS, 65536)
    order = request.args.get("order") or "time"
    if order not in ("time", "speed"):
        raise BadRequest(f"Parameter 'order' must be time or speed, got {order!r}.")
    return jsonify(reads.waterfall(db_session(), m.id, point, _kind(request.args), t0, t1, n, bins,
                                   by_speed=order == "speed"))


@bp.get("/machines/<machine_id>/compare")
@require("viewer")
def machine_compare(machine_id: str):
    """A point's spectrum (``now``: a stored spectrum id; default its newest) against the
    spectrum its baseline was learned from."""
    m = machine_or_404(machine_id)
    point = _point(m, request.args, required=True)
    assert point is not None
    kind = _kind(request.args)
    s = db_session()
    now_id = _int(request.args, "now", 0, 2**63 - 1) if request.args.get("now") else None
    now = reads.get_spectrum(s, now_id) if now_id is not None else reads.newest_spectrum(s, m.id, point, kind)
    if now is None or now.machine_id != m.id or now.point_id != point:
        raise NotFound(f"Point {point!r} of machine {m.id!r} has no such stored {kind} spectrum.")
    base, since = reads.baseline_spectrum(s, m.id, point, now.kind)
    speeds = reads.reading_speeds(s, [now] if base is None else [now, base])
    return jsonify({"machine": m.id, "point": point, "kind": now.kind,
                    "baseline_since": iso_utc(since) if since is not None else None,
                    "now": reads.spectrum_json(now, speed_hz=speeds[now.id]),
                    "baseline": None if base is None else reads.spectrum_json(base, speed_hz=speeds[base.id])})


@bp.get("/machines/<machine_id>/passages/<int:passage_id>/sweep")
@require("viewer")
def passage_sweep(machine_id: str, passage_id: int):
    m = machine_or_404(machine_id)
    p = reads.get_passage(db_session(), m.id, passage_id)
    if p is None:
        raise NotFound(f"Machine {m.id!r} has no passage with id {passage_id}.")
    return jsonify({**reads.passage_json(p, with_points=False), **sweep_plot(p.points or []).to_json()})
