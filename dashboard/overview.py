"""Plant overview page (its table is filled, a page at a time, from /api/v1/machines) and
the parsing of the overview's filters, sort and page, shared with the API."""

from __future__ import annotations

import re
from collections.abc import Mapping

from flask import Blueprint, current_app, render_template

from dashboard.db import db_session
from dashboard.errors import BadRequest
from dashboard.ids import parse_cursor
from dashboard.security import require
from monitor.detection.alarms import SEVERITIES
from monitor.store import reads

bp = Blueprint("overview", __name__)

#: Machines per page when the request names no limit.
DEFAULT_OVERVIEW_PAGE = 50
#: Longest text filter, characters (a machine's name is at most 200).
MAX_TEXT = 200
#: Characters a text filter may not hold (C0 controls and DEL: no name holds them, and
#: PostgreSQL refuses NUL in a string).
CONTROL = re.compile(r"[\x00-\x1f\x7f]")


def _choice(args: Mapping[str, str], key: str, allowed: tuple[str, ...]) -> str | None:
    v = args.get(key) or None
    if v is not None and v not in allowed:
        raise BadRequest(f"Parameter '{key}' must be one of {', '.join(allowed)}, got {v!r}.")
    return v


def _text(args: Mapping[str, str], key: str) -> str | None:
    v = args.get(key) or None
    if v is not None and len(v) > MAX_TEXT:
        raise BadRequest(f"Parameter '{key}' must be at most {MAX_TEXT} characters, got {len(v)}.")
    if v is not None and CONTROL.search(v):
        raise BadRequest(f"Parameter '{key}' must not contain control characters, got {v!r}.")
    return v


def parse_overview(args: Mapping[str, str]) -> reads.OverviewQuery:
    """The overview's filters, sort and page from query parameters (docs/api.md,
    "Machines"); an empty parameter means not given."""
    sorts = (*reads.SORT_KEYS, *(f"-{k}" for k in reads.SORT_KEYS))
    raw_limit = args.get("limit", str(DEFAULT_OVERVIEW_PAGE))
    top = reads.MAX_OVERVIEW_PAGE
    if not re.fullmatch(r"[0-9]{1,4}", raw_limit) or not 1 <= int(raw_limit) <= top:
        raise BadRequest(f"Parameter 'limit' must be an integer 1-{top}, got {raw_limit!r}.")
    # The cursor is the offset of the page in the sorted, filtered list ('next' gives it).
    offset = parse_cursor(args.get("cursor")) or 0
    return reads.OverviewQuery(
        text=_text(args, "q"), group=_text(args, "group"),
        state=_choice(args, "state", reads.OVERVIEW_STATES), severity=_choice(args, "severity", SEVERITIES),
        zone=_choice(args, "zone", reads.ZONES), sort=_choice(args, "sort", sorts) or "state",
        offset=offset, limit=int(raw_limit))


@bp.get("/")
@require("viewer")
def index():
    return render_template("overview/index.html", refresh_s=current_app.config["OVERVIEW_REFRESH_S"],
                           groups=reads.machine_groups(db_session()), page_size=DEFAULT_OVERVIEW_PAGE)
