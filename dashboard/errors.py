"""Errors the dashboard raises, and the one handler that renders them.

Exception tree::

    DashboardError (status 500)
     +-- BadRequest          400  a parameter or body is malformed
     +-- Unauthorised        401  no session and no valid API token
     +-- Forbidden           403  signed in, but the role does not allow it
     +-- NotFound            404  no such machine, alarm, mode, user or token
     +-- Conflict            409  the change clashes with the stored state
     +-- TooManyAttempts     429  too many failed sign-ins (dashboard/login_limits.py)

A database that is busy or unreachable (SQLAlchemy's OperationalError: SQLite's lock held
past the busy timeout, PostgreSQL away) answers 503 ``database_unavailable`` with
``Retry-After``: nothing was changed and the same request may be sent again.

Requests under ``/api/`` get JSON in one fixed shape::

    {"error": {"status": 404, "code": "not_found", "message": "..."}}

every other request gets the HTML error page. Werkzeug's own HTTP errors (unknown URL,
wrong method, CSRF failure) go through the same handler, so the shape never varies; a 405
keeps its ``Allow`` header (RFC 9110, section 15.5.6). :data:`CODES` lists every code an
answer can carry (docs/api.md, "Errors", lists the same).
"""

from __future__ import annotations

from flask import Flask, Response, jsonify, make_response, render_template, request
from flask_wtf.csrf import CSRFError
from sqlalchemy.exc import OperationalError
from werkzeug.exceptions import HTTPException, MethodNotAllowed


class DashboardError(Exception):
    """Base class: carries the HTTP status and a short machine-readable code."""

    status = 500
    code = "internal_error"

    def __init__(self, message: str) -> None:
        super().__init__(message)
        self.message = message


class BadRequest(DashboardError):
    status = 400
    code = "bad_request"


class Unauthorised(DashboardError):
    status = 401
    code = "unauthorised"


class Forbidden(DashboardError):
    status = 403
    code = "forbidden"


class NotFound(DashboardError):
    status = 404
    code = "not_found"


class Conflict(DashboardError):
    status = 409
    code = "conflict"


class TooManyAttempts(DashboardError):
    status = 429
    code = "too_many_attempts"


#: Codes of the HTTP layer's own errors (unknown URL, wrong method, body too large, ...).
_HTTP_CODES = {
    400: "bad_request",
    401: "unauthorised",
    403: "forbidden",
    404: "not_found",
    405: "method_not_allowed",
    409: "conflict",
    413: "too_large",
    429: "too_many_attempts",
}
#: Seconds a client is asked to wait after a 503 (RFC 9110, section 10.2.3): a little more
#: than the store's busy timeout (monitor/store/db.py, DEFAULT_BUSY_TIMEOUT_MS).
RETRY_AFTER_S = 15

#: The code of an HTTP-layer error of any other status.
OTHER_HTTP_CODE = "http_error"

#: Every code an error answer under ``/api/`` can carry, with its status (None: the
#: status of the HTTP-layer error itself).
CODES: dict[str, int | None] = {
    **{code: status for status, code in _HTTP_CODES.items()},
    "csrf_failed": 400,
    "internal_error": 500,
    "database_unavailable": 503,
    OTHER_HTTP_CODE: None,
}


def error_body(status: int, code: str, message: str) -> dict:
    """The fixed JSON error shape used by every ``/api/`` response."""
    return {"error": {"status": status, "code": code, "message": message}}


def _render(status: int, code: str, message: str) -> Response:
    if request.path.startswith("/api/"):
        resp = jsonify(error_body(status, code, message))
        resp.status_code = status
        if status == 401:
            resp.headers["WWW-Authenticate"] = 'Bearer realm="whirlwatch"'
        return resp
    return make_response(render_template("error.html", status=status, message=message), status)


def render(exc: DashboardError) -> Response:
    """The response for ``exc``: JSON under ``/api/``, else the HTML error page."""
    return _render(exc.status, exc.code, exc.message)


def register(app: Flask) -> None:
    """Attach the single error handler to ``app``."""

    @app.errorhandler(DashboardError)
    def _dashboard_error(exc: DashboardError):
        return render(exc)

    @app.errorhandler(CSRFError)
    def _csrf_error(exc: CSRFError):
        return _render(400, "csrf_failed", f"The request was refused: {exc.description}")

    @app.errorhandler(HTTPException)
    def _http_error(exc: HTTPException):
        status = exc.code or 500
        resp = _render(status, _HTTP_CODES.get(status, OTHER_HTTP_CODE), exc.description or "")
        if isinstance(exc, MethodNotAllowed) and exc.valid_methods:
            # RFC 9110, section 15.5.6: a 405 answer lists the methods the target has.
            resp.headers["Allow"] = ", ".join(exc.valid_methods)
        return resp

    @app.errorhandler(OperationalError)
    def _database_unavailable(exc: OperationalError):
        from monitor.store.db import describe_database_error

        app.logger.warning("database unavailable on %s: %s", request.path, describe_database_error(exc))
        resp = _render(503, "database_unavailable",
                       "The database is busy or unreachable; nothing was changed. Try again shortly.")
        resp.headers["Retry-After"] = str(RETRY_AFTER_S)
        return resp

    @app.errorhandler(Exception)
    def _unexpected(exc: Exception):
        app.logger.exception("unhandled error on %s", request.path)
        return _render(500, "internal_error", "The server hit an unexpected error.")
