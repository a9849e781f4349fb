"""whirlwatch web dashboard and JSON API (Flask application factory).

``create_app(config=None)`` builds the app; ``config`` is a mapping of Flask settings
plus these of our own:

- ``DATABASE_URL``: SQLAlchemy URL of the store (default ``sqlite:///whirlwatch.sqlite``).
- ``LOGIN_MAX_FAILURES`` / ``LOGIN_WINDOW_S``: failed sign-ins allowed per user and
  client address within the window (default 5 in 300 s).
- ``OVERVIEW_REFRESH_S``: how often the overview page refetches the API (default 15 s).
- ``SECRET_KEY``: signs the session cookie; a random key per process when not given
  (sessions then end when the process restarts).
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from datetime import timedelta
from typing import Any

from flask import Flask
from flask_wtf.csrf import CSRFProtect

DEFAULTS: dict[str, Any] = {
    "DATABASE_URL": "sqlite:///whirlwatch.sqlite",
    "LOGIN_MAX_FAILURES": 5,
    "LOGIN_WINDOW_S": 300.0,
    "OVERVIEW_REFRESH_S": 15,
    "SESSION_COOKIE_HTTPONLY": True,
    "SESSION_COOKIE_SAMESITE": "Lax",
    "PERMANENT_SESSION_LIFETIME": timedelta(hours=12),
    "WTF_CSRF_TIME_LIMIT": None,  # token lives as long as the session
    "MAX_CONTENT_LENGTH": 1 << 20,
    "JSON_SORT_KEYS": False,
}


def create_app(config: Mapping[str, Any] | None = None) -> Flask:
    """Build the dashboard application.

    Parameters
    ----------
    config : mapping, optional
        Settings overriding :data:`DEFAULTS` (see the module docstring).
    """
    app = Flask(__name__)
    app.config.update(DEFAULTS)
    app.config["SECRET_KEY"] = os.urandom(32)
    if config:
        app.config.update(config)

    CSRFProtect(app)
    from dashboard import db, errors, security

    app.extensions["whirlwatch_login_limiter"] = security.LoginLimiter(
        int(app.config["LOGIN_MAX_FAILURES"]), float(app.config["LOGIN_WINDOW_S"])
    )
    db.init_app(app)
    errors.register(app)
    security.register(app)

    from dashboard import alarms, api, auth, machines, overview

    app.register_blueprint(auth.bp)
    app.register_blueprint(overview.bp)
    app.register_blueprint(machines.bp)
    app.register_blueprint(alarms.bp)
    app.register_blueprint(api.bp)
    # The API authenticates tokens itself and checks CSRF only for session writes.
    app.extensions["csrf"].exempt(api.bp)

    @app.template_filter("ts")
    def _ts(t):
        return "–" if t is None else t.strftime("%Y-%m-%d %H:%M UTC")

    @app.template_filter("iso")
    def _iso(text):
        return "–" if not text else str(text).replace("T", " ")[:16] + " UTC"

    @app.context_processor
    def _inject():
        from dashboard.security import current

        return {"principal": current()}

    return app
