"""``whirlwatch dashboard``: serve the web dashboard and JSON API."""

from __future__ import annotations

import os

import click

#: Environment variable holding the key that signs session cookies (never a command-line
#: option, where it would show in the process list).
SECRET_KEY_ENV = "WHIRLWATCH_DASHBOARD_SECRET_KEY"


@click.command("dashboard")
@click.option("--host", default="127.0.0.1", show_default=True, help="Address to listen on.")
@click.option("--port", default=8050, show_default=True, type=click.IntRange(1, 65535), help="TCP port.")
@click.option("--database", "database", default="sqlite:///whirlwatch.sqlite", show_default=True,
              envvar="WHIRLWATCH_DATABASE", help="SQLAlchemy URL of the store.")
@click.option("--behind-tls-proxy", is_flag=True, envvar="WHIRLWATCH_DASHBOARD_BEHIND_TLS_PROXY",
              help="Reached through one HTTPS reverse proxy: trust its X-Forwarded-For/-Proto/-Host, "
                   "mark the session cookie Secure, send HSTS (docs/security.md).")
@click.option("--limiter-storage", default="memory://", show_default=True, metavar="URL",
              envvar="WHIRLWATCH_DASHBOARD_LIMITER_STORAGE",
              help="Where failed sign-ins are counted: memory:// (this process) or redis://HOST:6379/0 "
                   "shared by several dashboard processes.")
def dashboard(host: str, port: int, database: str, behind_tls_proxy: bool, limiter_storage: str) -> None:
    """Serve the dashboard and the JSON API (threaded server; put a TLS proxy in front).

    Several processes need the same session key in WHIRLWATCH_DASHBOARD_SECRET_KEY."""
    from limits.errors import ConfigurationError
    from werkzeug.serving import WSGIRequestHandler, run_simple

    from dashboard import create_app
    from dashboard.security import SERVER_HEADER
    from monitor.redact import redact
    from monitor.store.db import StoreError, make_engine, require_schema

    try:
        require_schema(make_engine(database))
    except StoreError as exc:
        raise click.ClickException(str(exc)) from None
    config = {"DATABASE_URL": database, "BEHIND_TLS_PROXY": behind_tls_proxy,
              "LOGIN_LIMIT_STORAGE_URL": limiter_storage}
    if os.environ.get(SECRET_KEY_ENV):
        config["SECRET_KEY"] = os.environ[SECRET_KEY_ENV]
    try:
        app = create_app(config)
    except ConfigurationError as exc:
        raise click.ClickException(
            f"--limiter-storage {redact(limiter_storage)!r} cannot be used: {redact(str(exc))}") from None

    class Handler(WSGIRequestHandler):
        def version_string(self) -> str:
            # The Server header names no product or version (OWASP ASVS 4.0.3 V14.3.3).
            return SERVER_HEADER

    click.echo(f"whirlwatch dashboard on http://{host}:{port}/", err=True)
    run_simple(host, port, app, threaded=True, use_reloader=False, use_debugger=False,
               request_handler=Handler)
