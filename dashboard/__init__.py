"""whirlwatch web dashboard and JSON API (Flask application factory).

``create_app(config=None)`` builds the app; ``config`` is a mapping of Flask settings
plus these of our own (docs/security.md describes each and how to set it):

- ``DATABASE_URL``: SQLAlchemy URL of the store (default ``sqlite:///whirlwatch.sqlite``).
- ``DATABASE_BUSY_TIMEOUT_MS``: how long a write waits for SQLite's lock before the
  request answers 503 (the settings' ``database.busy_timeout_ms``).
- ``LOGIN_LIMIT_PER_ADDRESS`` / ``LOGIN_LIMIT_PER_ACCOUNT``: failed sign-ins allowed per
  client address and per account, as windows (dashboard/login_limits.py).
- ``LOGIN_LIMIT_STORAGE_URL``: where those counts live: ``memory://`` (per process) or a
  ``redis://`` URL shared by several dashboard processes.
- ``BEHIND_TLS_PROXY``: the dashboard is reached through one HTTPS reverse proxy that sets
  X-Forwarded-For, -Proto and -Host: trust them, mark the session cookie ``Secure`` and
  send HSTS.
- ``OVERVIEW_REFRESH_S``: how often the overview page refetches the API (default 15 s).
- ``TIME_ZONE``: the plant's IANA time zone; pages and charts show every time in it,
  24-hour, with its UTC offset (the template filter ``ts`` here, ``WW.when`` in the
  browser; the API keeps ISO 8601 UTC).
- ``MAX_SHELVE_HOURS``: the longest an engineer may shelve an alarm for, hours (the
  settings' ``alarms.max_shelve_hours``; docs/alarms.md, "Shelving and out of service").
- ``SECRET_KEY``: signs the session cookie; a random key per process when not given
  (sessions then end when the process restarts, and several processes need one key).
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from datetime import timedelta
from typing import Any

from flask import Flask
from flask_wtf.csrf import CSRFProtect
from werkzeug.middleware.proxy_fix import ProxyFix

from monitor.model.timefmt import plant_time, time_zone
from monitor.settings import default
from monitor.store.db import DEFAULT_BUSY_TIMEOUT_MS

DEFAULTS: dict[str, Any] = {
    "DATABASE_URL": "sqlite:///whirlwatch.sqlite",
    "DATABASE_BUSY_TIMEOUT_MS": DEFAULT_BUSY_TIMEOUT_MS,
    # A guesser waits a minute, then an hour, then a day; OWASP ASVS 4.0.3 V2.2.1 allows
    # at most 100 failures per account and hour.
    "LOGIN_LIMIT_PER_ADDRESS": "10 per minute; 50 per hour; 200 per day",
    "LOGIN_LIMIT_PER_ACCOUNT": "5 per minute; 20 per hour; 100 per day",
    "LOGIN_LIMIT_STORAGE_URL": "memory://",
    "BEHIND_TLS_PROXY": False,
    "OVERVIEW_REFRESH_S": 15,
    "TIME_ZONE": "UTC",
    "MAX_SHELVE_HOURS": default("alarms.max_shelve_hours"),
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
    from dashboard.ids import IdConverter

    # Before any route is added: every <int:...> id is one the database can hold.
    app.url_map.converters["int"] = IdConverter
    app.config.update(DEFAULTS)
    app.config["SECRET_KEY"] = os.urandom(32)
    if config:
        app.config.update(config)

    if app.config["BEHIND_TLS_PROXY"]:
        # One proxy in front: take the client's address, scheme and host from it.
        app.config["SESSION_COOKIE_SECURE"] = True
        app.wsgi_app = ProxyFix(app.wsgi_app, x_for=1, x_proto=1, x_host=1)  # type: ignore[method-assign]

    CSRFProtect(app)
    from dashboard import db, errors, security

    db.init_app(app)
    errors.register(app)
    security.register(app)

    from dashboard import (
        alarms,
        api,
        audit,
        auth,
        evidence_api,
        export_api,
        health,
        login_limits,
        machines,
        overview,
        shelving,
        stops_api,
        tokens,
        users,
    )

    app.register_blueprint(auth.bp)
    app.register_blueprint(users.bp)
    app.register_blueprint(tokens.bp)
    app.register_blueprint(audit.bp)
    app.register_blueprint(overview.bp)
    app.register_blueprint(machines.bp)
    app.register_blueprint(alarms.bp)
    app.register_blueprint(api.bp)
    app.register_blueprint(evidence_api.bp)
    app.register_blueprint(export_api.bp)
    app.register_blueprint(stops_api.bp)
    app.register_blueprint(audit.api_bp)
    app.register_blueprint(health.bp)
    app.register_blueprint(shelving.bp)
    app.register_blueprint(shelving.api_bp)
    # The API authenticates tokens itself and checks CSRF only for session writes.
    app.extensions["csrf"].exempt(api.bp)
    app.extensions["csrf"].exempt(evidence_api.bp)
    app.extensions["csrf"].exempt(stops_api.bp)
    app.extensions["csrf"].exempt(audit.api_bp)
    app.extensions["csrf"].exempt(shelving.api_bp)
    login_limits.install(app)

    zone = time_zone(app.config["TIME_ZONE"])

    @app.template_filter("ts")
    def _ts(when):
        # Datetimes, epoch seconds and ISO text alike: one way of showing a time.
        return plant_time(when, zone)

    # Older templates' name for the same filter.
    app.add_template_filter(_ts, "iso")

    @app.context_processor
    def _inject():
        from dashboard.security import current

        return {"principal": current(), "time_zone": app.config["TIME_ZONE"], **shelving.planned_work_banner()}

    return app
