"""The audit trail (admin): a page at /audit and ``GET /api/v1/audit``.

Both list :mod:`monitor.store.audit` rows newest first, filtered by user (as actor or
target) and action, a page at a time (``cursor`` is the ``next`` of the previous page).
OWASP ASVS 4.0.3 V7.1.3, V7.1.4 (security events with who, what, when, where).
"""

from __future__ import annotations

from collections.abc import Mapping

from flask import Blueprint, jsonify, render_template, request, url_for

from dashboard.db import db_session
from dashboard.errors import BadRequest
from dashboard.ids import parse_cursor
from dashboard.security import require
from monitor.store.audit import ACTIONS
from monitor.store.reads import MAX_AUDIT_PAGE, audit_event_json, find_audit_events

bp = Blueprint("audit", __name__, url_prefix="/audit")
api_bp = Blueprint("audit_api", __name__, url_prefix="/api/v1")

#: The longest user name the store holds (monitor/store/models.py, users.name).
MAX_USER_NAME = 100

def _query(args: Mapping[str, str]) -> dict:
    action = args.get("action") or None
    if action is not None and action not in ACTIONS:
        raise BadRequest(f"Parameter 'action' must be one of {', '.join(ACTIONS)}, got {action!r}.")
    try:
        limit = int(args.get("limit", 50))
    except ValueError:
        raise BadRequest(f"Parameter 'limit' must be an integer 1-{MAX_AUDIT_PAGE}, got {args.get('limit')!r}.") from None
    if not 1 <= limit <= MAX_AUDIT_PAGE:
        raise BadRequest(f"Parameter 'limit' must be an integer 1-{MAX_AUDIT_PAGE}, got {limit}.")
    user = args.get("user") or ""
    if len(user) > MAX_USER_NAME:
        raise BadRequest(f"Parameter 'user' must be a user name of at most {MAX_USER_NAME} characters.")
    return {"user": user.strip() or None, "action": action,
            "before_id": parse_cursor(args.get("cursor")),
            "limit": limit}


@bp.get("/", strict_slashes=False)
@require("admin")
def index():
    q = _query(request.args)
    rows, nxt = find_audit_events(db_session(), **q)
    args = {k: v for k, v in request.args.items() if k != "cursor" and v}
    return render_template("auth/audit.html", events=[audit_event_json(e) for e in rows], actions=ACTIONS,
                           args=args, next_url=url_for("audit.index", **args, cursor=nxt) if nxt else None)


@api_bp.get("/audit")
@require("admin")
def api_index():
    rows, nxt = find_audit_events(db_session(), **_query(request.args))
    return jsonify({"items": [audit_event_json(e) for e in rows], "next": None if nxt is None else str(nxt)})
