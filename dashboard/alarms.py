"""Alarms page: filter, acknowledge with a comment, CSV export."""

from __future__ import annotations

import csv
import datetime as dt
import io
import json
import re
from collections.abc import Mapping

from flask import (
    Blueprint,
    Response,
    current_app,
    flash,
    redirect,
    render_template,
    request,
    url_for,
)

from dashboard.db import db_session
from dashboard.errors import BadRequest, Conflict, NotFound, Unauthorised
from dashboard.ids import parse_cursor
from dashboard.redirects import same_origin_path
from dashboard.security import current, require
from monitor import wording
from monitor.detection.alarms import KINDS, SEVERITIES
from monitor.model.timefmt import parse_iso_utc
from monitor.store import reads
from monitor.store.models import Alarm
from monitor.store.writes import acknowledge_alarm

bp = Blueprint("alarms", __name__, url_prefix="/alarms")

STATES = ("open", "active", "acknowledged", "cleared")
MAX_LIMIT = 500
CSV_MAX_ROWS = 100_000


#: Epoch seconds as a query takes them: a non-negative decimal (11 digits reach year 5138).
EPOCH_PATTERN = r"[0-9]{1,11}(\.[0-9]{1,9})?"
#: The forms a query time takes (docs/api.md; dashboard/openapi.json states the same):
#: epoch seconds, an RFC 3339 date-time (section 5.6: "T" and "Z" in either case, an offset
#: required) or a date (full-date); the calendar is checked when it is read.
TIME_PATTERN = re.compile(
    rf"{EPOCH_PATTERN}|[0-9]{{4}}-[0-9]{{2}}-[0-9]{{2}}"
    r"([Tt][0-9]{2}:[0-9]{2}:[0-9]{2}(\.[0-9]+)?([Zz]|[+-][0-9]{2}:[0-9]{2}))?")
_UTC_MIN = dt.datetime.min.replace(tzinfo=dt.UTC)
_UTC_MAX = dt.datetime.max.replace(tzinfo=dt.UTC)


def parse_time(value: str | None, name: str) -> dt.datetime | None:
    """A query time (:data:`TIME_PATTERN`; a date is its midnight UTC) as an aware UTC datetime, None
    when absent or empty; BadRequest naming the parameter otherwise. A time whose offset
    takes it beyond year 1 or 9999 is taken as the earliest or latest time there is."""
    if not value:
        return None
    if not TIME_PATTERN.fullmatch(value):
        raise BadRequest(f"Parameter '{name}' must be ISO 8601 or epoch seconds, got {value!r}.")
    if re.fullmatch(EPOCH_PATTERN, value):
        return dt.datetime.fromtimestamp(float(value), dt.UTC)
    try:
        return parse_iso_utc(value.upper())
    except ValueError:
        raise BadRequest(f"Parameter '{name}' is no valid date or time: {value!r}.") from None
    except OverflowError:
        return _UTC_MIN if value < "5000" else _UTC_MAX


def before(t: dt.datetime, span: dt.timedelta) -> dt.datetime:
    """``t - span``, or the earliest time there is."""
    try:
        return t - span
    except OverflowError:
        return _UTC_MIN


def time_span(args: Mapping[str, str], default: dt.timedelta) -> tuple[dt.datetime, dt.datetime]:
    """The ``from`` and ``to`` query parameters as aware UTC datetimes: ``to`` defaults to
    now and ``from`` to ``default`` before it. A ``from`` after ``to`` is an empty window,
    not an error."""
    t1 = parse_time(args.get("to"), "to") or dt.datetime.now(dt.UTC)
    return parse_time(args.get("from"), "from") or before(t1, default), t1


def parse_filters(args: Mapping[str, str]) -> dict:
    """The alarm filters shared by the page, the CSV export and the API."""
    f: dict = {}
    for key, allowed in (("state", STATES), ("kind", KINDS), ("severity", SEVERITIES)):
        v = args.get(key) or None
        if v is not None and v not in allowed:
            raise BadRequest(f"Parameter '{key}' must be one of {', '.join(allowed)}, got {v!r}.")
        f[key] = v
    f["machine"] = args.get("machine") or None
    f["point"] = args.get("point") or None
    f["since"] = parse_time(args.get("from"), "from")
    f["until"] = parse_time(args.get("to"), "to")
    return f


def parse_page(args: Mapping[str, str], default: int = 50) -> tuple[int, int | None]:
    try:
        limit = int(args.get("limit", default))
    except ValueError:
        raise BadRequest(f"Parameter 'limit' must be an integer 1-{MAX_LIMIT}, got {args.get('limit')!r}.") from None
    if not 1 <= limit <= MAX_LIMIT:
        raise BadRequest(f"Parameter 'limit' must be an integer 1-{MAX_LIMIT}, got {limit}.")
    return limit, parse_cursor(args.get("cursor"))


def acting_user() -> str:
    """The name of the signed-in user a write view acts for (every write view requires a
    role, so there is one)."""
    p = current()
    if p is None:
        raise Unauthorised("Sign in to change anything.")
    return p.username


#: Longest acknowledgement comment, characters (dashboard/openapi.json states the same).
MAX_COMMENT = 2000


def check_comment(comment: str) -> str:
    """The acknowledgement comment without surrounding white space; BadRequest naming the
    field when it is empty or blank (docs/alarms.md: an acknowledgement needs a comment) or
    longer than :data:`MAX_COMMENT` characters."""
    text = comment.strip()
    if not text:
        raise BadRequest("Field 'comment' is required: say what was checked or decided.")
    if len(text) > MAX_COMMENT:
        raise BadRequest(f"Field 'comment' must be at most {MAX_COMMENT} characters.")
    return text


def do_acknowledge(alarm_id: int, comment: str) -> Alarm:
    """Acknowledge active alarm ``alarm_id`` for the signed-in user with ``comment`` (checked
    by :func:`check_comment` before anything is read or stored), and commit."""
    text = check_comment(comment)
    s = db_session()
    a = s.get(Alarm, alarm_id)
    if a is None:
        raise NotFound(f"No alarm with id {alarm_id}.")
    if a.state != "active":
        raise Conflict(f"Alarm {alarm_id} is {a.state}; only an active alarm can be acknowledged.")
    # The store records the transition; the request commits it.
    a = acknowledge_alarm(s, a.id, acting_user(), text)
    s.commit()
    return a


@bp.get("/")
@require("viewer")
def index():
    f = parse_filters(request.args)
    limit, cursor = parse_page(request.args)
    rows, nxt = reads.find_alarms(db_session(), **f, before_id=cursor, limit=limit)
    args = {k: v for k, v in request.args.items() if k != "cursor" and v}
    machines = [(m["id"], m["name"]) for m in reads.machine_list(db_session())]
    return render_template(
        "alarms/index.html", alarms=[with_words(reads.alarm_json(a)) for a in rows], next_cursor=nxt,
        args=args, states=STATES, kinds=[(k, wording.kind_words(k)) for k in KINDS], severities=SEVERITIES,
        machines=machines,
        csv_url=url_for("alarms.export_csv", **args),
        next_url=url_for("alarms.index", **args, cursor=nxt) if nxt else None,
    )


@bp.get("/<int:alarm_id>")
@require("viewer")
def detail(alarm_id: int):
    """One alarm's evidence page: what it is about in words, each step with its evidence
    as a table (values rounded, with units), the spectra stored with it; the raw JSON one
    link away (the API) for integrators."""
    a = reads.get_alarm(db_session(), alarm_id)
    if a is None:
        raise NotFound(f"No alarm with id {alarm_id}.")
    d = reads.alarm_json(a, with_transitions=True)
    when = current_app.jinja_env.filters["ts"]
    steps = [{**t, "rows": wording.evidence_rows(t["evidence"], when),
              "spectra": _spectra_of(t["evidence"], t["spectrum_id"]),
              "hints": _hints_of(t["evidence"])} for t in d["transitions"]]
    return render_template("alarms/detail.html", alarm=d, steps=steps,
                           deliveries=reads.alarm_deliveries(db_session(), alarm_id),
                           summary=wording.alarm_summary(d["kind"], d["subject"]),
                           kind_text=wording.kind_words(d["kind"]),
                           subject_text=wording.subject_words(d["kind"], d["subject"]))


def _hints_of(evidence: object) -> list[dict]:
    """The likely-cause hints a growth step's evidence carries (monitor/detection/causes.py)."""
    hints = evidence.get("hints") if isinstance(evidence, dict) else None
    return [h for h in hints or () if isinstance(h, dict)]


def _spectra_of(evidence: object, spectrum_id: int | None) -> list[dict]:
    """The spectra a step's evidence lists (point, kind, id), or the one stored with it."""
    listed = evidence.get("spectra") if isinstance(evidence, dict) else None
    out = [s for s in listed or () if isinstance(s, dict) and isinstance(s.get("spectrum_id"), int)]
    if not out and spectrum_id is not None:
        out = [{"spectrum_id": spectrum_id, "point": None, "kind": "velocity"}]
    return out


@bp.post("/<int:alarm_id>/acknowledge")
@require("engineer")
def acknowledge(alarm_id: int):
    back = same_origin_path(request.form.get("back")) or ""
    back = back if back.startswith("/alarms") else url_for("alarms.index")
    try:
        a = do_acknowledge(alarm_id, request.form.get("comment", ""))
    except BadRequest as exc:
        # Back to the list the form came from, the one sentence on top; nothing stored.
        flash(exc.message, "error")
        return redirect(back)
    flash(f"Alarm {a.id} acknowledged.", "ok")
    return redirect(back)


def with_words(d: dict) -> dict:
    """An alarm's JSON with its kind and subject in words (``kind_text``, ``subject_text``,
    ``summary``) for the pages and the CSV (monitor/wording.py)."""
    return {**d, "kind_text": wording.kind_words(d["kind"]),
            "subject_text": wording.subject_words(d["kind"], d["subject"]),
            "summary": wording.alarm_summary(d["kind"], d["subject"])}


#: The CSV's columns: the API's keys (integrators read them), then the alarm in words.
CSV_COLUMNS = ("id", "machine", "point", "kind", "subject", "severity", "state", "raised_at",
               "cleared_at", "acknowledged_by", "acknowledged_at", "ack_comment", "evidence", "summary")


def _csv_cell(v) -> str:
    if isinstance(v, dict | list):
        v = json.dumps(v, separators=(",", ":"))
    text = "" if v is None else str(v)
    # A cell starting with = + - @ would run as a formula in a spreadsheet.
    return "'" + text if text[:1] in ("=", "+", "-", "@") else text


@bp.get("/export.csv")
@require("viewer")
def export_csv():
    f = parse_filters(request.args)

    def rows():
        buf = io.StringIO()
        w = csv.writer(buf)
        w.writerow(CSV_COLUMNS)
        cursor, sent = None, 0
        s = db_session()
        while sent < CSV_MAX_ROWS:
            page, cursor = reads.find_alarms(s, **f, before_id=cursor, limit=MAX_LIMIT)
            for a in page:
                d = with_words(reads.alarm_json(a))
                w.writerow([_csv_cell(d[c]) for c in CSV_COLUMNS])
            sent += len(page)
            yield buf.getvalue()
            buf.seek(0)
            buf.truncate()
            if cursor is None:
                break

    from flask import stream_with_context

    return Response(stream_with_context(rows()), mimetype="text/csv",
                    headers={"Content-Disposition": 'attachment; filename="whirlwatch-alarms.csv"'})
