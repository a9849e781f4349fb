"""``/healthz`` and ``/readyz`` of the dashboard process, for a container engine's or a
load balancer's health checks (docs/deploy.md). Open to anyone and answering in JSON,
like the service's (docs/service.md, "Health"); they say nothing a caller could not learn
from the sign-in page.

``/healthz``: 200 ``{"ok": true}`` while the process serves requests.
``/readyz``: 200 ``{"ready": true, "problems": []}`` when the store answers and has its
tables; else 503 with the reasons, each one sentence without the database URL.
"""

from __future__ import annotations

from flask import Blueprint, Response, jsonify
from sqlalchemy import text
from sqlalchemy.exc import SQLAlchemyError

from dashboard.db import engine
from monitor.store.db import describe_database_error, has_schema

bp = Blueprint("health", __name__)


def _no_store(resp: Response, status: int) -> tuple[Response, int]:
    resp.headers["Cache-Control"] = "no-store"
    return resp, status


@bp.get("/healthz")
def healthz() -> tuple[Response, int]:
    return _no_store(jsonify(ok=True), 200)


@bp.get("/readyz")
def readyz() -> tuple[Response, int]:
    problems: list[str] = []
    try:
        eng = engine()
        with eng.connect() as conn:
            conn.execute(text("SELECT 1"))
        if not has_schema(eng):
            problems.append("the store has no whirlwatch tables; run `whirlwatch db upgrade`.")
    except SQLAlchemyError as exc:
        problems.append(describe_database_error(exc).replace("nothing was changed", "not ready"))
    return _no_store(jsonify(ready=not problems, problems=problems), 503 if problems else 200)
