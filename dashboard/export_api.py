"""Exports of the JSON API under /api/v1 (dashboard/openapi.json; docs/import-export.md):
a machine's trends and its stored spectra as CSV or Parquet, one row per reading or per
spectrum bin, units in the column names (monitor/store/reads/exports.py).

Each answer is bounded: ``max_rows`` (default :data:`DEFAULT_EXPORT_ROWS`, at most
:data:`MAX_EXPORT_ROWS`) caps the rows, and a range holding more is refused with 400
before anything is read, saying how many rows it holds.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping

from flask import Blueprint, Response, request

from dashboard.alarms import time_span
from dashboard.db import db_session, machine_or_404
from dashboard.errors import BadRequest, NotFound
from dashboard.evidence_api import KINDS
from dashboard.security import require
from dashboard.table_formats import FORMATS, MEDIA_TYPES, encode
from monitor.store import reads
from monitor.store.models import Machine

bp = Blueprint("export_api", __name__, url_prefix="/api/v1")

DEFAULT_EXPORT_ROWS = 100_000
MAX_EXPORT_ROWS = 1_000_000
DEFAULT_SPAN = dt.timedelta(days=7)



def _format(args: Mapping[str, str]) -> str:
    fmt = args.get("format") or "csv"
    if fmt not in FORMATS:
        raise BadRequest(f"Parameter 'format' must be one of {', '.join(FORMATS)}, got {fmt!r}.")
    return fmt


def _max_rows(args: Mapping[str, str]) -> int:
    raw = args.get("max_rows")
    try:
        n = DEFAULT_EXPORT_ROWS if raw in (None, "") else int(raw)
    except ValueError:
        raise BadRequest(f"Parameter 'max_rows' must be an integer 1-{MAX_EXPORT_ROWS}, got {raw!r}.") from None
    if not 1 <= n <= MAX_EXPORT_ROWS:
        raise BadRequest(f"Parameter 'max_rows' must be an integer 1-{MAX_EXPORT_ROWS}, got {n}.")
    return n



def _points(m: Machine) -> list[str]:
    known = [p.id for p in m.points if p.active]
    wanted = [p for p in request.args.getlist("point") if p] or known
    unknown = [p for p in wanted if p not in known]
    if unknown:
        raise NotFound(f"Machine {m.id!r} has no measurement point {unknown[0]!r}.")
    return list(dict.fromkeys(wanted))


def _too_many(exc: reads.TooManyRows) -> BadRequest:
    return BadRequest(f"The range holds {exc.rows} rows, more than max_rows={exc.limit}: narrow "
                      f"the time range or the points, or raise max_rows (at most {MAX_EXPORT_ROWS}).")


def _answer(columns: dict, fmt: str, name: str) -> Response:
    return Response(encode(columns, fmt), mimetype=MEDIA_TYPES[fmt],
                    headers={"Content-Disposition": f'attachment; filename="{name}.{fmt}"'})


@bp.get("/machines/<machine_id>/export/trends")
@require("viewer")
def export_trends(machine_id: str):
    """Every reading of the points in the range with the features asked for."""
    m = machine_or_404(machine_id)
    fmt, limit = _format(request.args), _max_rows(request.args)
    t0, t1 = time_span(request.args, DEFAULT_SPAN)
    points = _points(m)
    try:
        features = reads.check_features(list(dict.fromkeys(f for f in request.args.getlist("feature") if f)))
    except ValueError as exc:
        raise BadRequest(f"Parameter {exc}.") from None
    try:
        cols = reads.trend_table(db_session(), m, points, t0, t1, features, limit)
    except reads.TooManyRows as exc:
        raise _too_many(exc) from None
    return _answer(cols, fmt, f"{m.id}-trends")


@bp.get("/machines/<machine_id>/export/spectra")
@require("viewer")
def export_spectra(machine_id: str):
    """Every bin of the stored spectra of one kind of the points in the range."""
    m = machine_or_404(machine_id)
    fmt, limit = _format(request.args), _max_rows(request.args)
    t0, t1 = time_span(request.args, DEFAULT_SPAN)
    points = _points(m)
    kind = request.args.get("kind") or "velocity"
    if kind not in KINDS:
        raise BadRequest(f"Parameter 'kind' must be one of {', '.join(KINDS)}, got {kind!r}.")
    try:
        cols = reads.spectrum_table(db_session(), m, points, kind, t0, t1, limit)
    except reads.TooManyRows as exc:
        raise _too_many(exc) from None
    return _answer(cols, fmt, f"{m.id}-spectra-{kind}")
