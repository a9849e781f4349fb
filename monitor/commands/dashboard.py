"""``whirlwatch dashboard``: serve the web dashboard and JSON API.

It reads the settings registry as the service does (the same file with ``--config``, the
same ``WHIRLWATCH_*`` variables, docs/configuration.md), so with no options it opens the
service's store. Options override the file and the environment.
"""

from __future__ import annotations

import ipaddress
import os
import signal
import sys
from collections.abc import Callable, Mapping
from pathlib import Path

import click

from monitor.settings import BY_NAME

#: The variable that named the store before the dashboard read the settings registry;
#: still read, with a warning, when ``WHIRLWATCH_DATABASE_URL`` is not set.
LEGACY_DATABASE_ENV = "WHIRLWATCH_DATABASE"

#: Each option and the setting it overrides (docs/security.md, "Dashboard settings").
OPTION_SETTINGS: dict[str, str] = {
    "--host": "dashboard.host",
    "--port": "dashboard.port",
    "--database": "database.url",
    "--behind-tls-proxy": "dashboard.behind_tls_proxy",
    "--limiter-storage": "dashboard.limiter_storage",
    "--time-zone": "dashboard.time_zone",
    "--threads": "dashboard.threads",
}


def _warn(text: str) -> None:
    click.echo(text, err=True)


def environment(env: Mapping[str, str], warn: Callable[[str], None] = _warn) -> dict[str, str]:
    """``env`` with :data:`LEGACY_DATABASE_ENV` moved to ``WHIRLWATCH_DATABASE_URL``
    (which wins when both are set); ``warn`` says so either way."""
    out = dict(env)
    current = BY_NAME["database.url"].env
    if LEGACY_DATABASE_ENV in out:
        legacy = out.pop(LEGACY_DATABASE_ENV)
        if current in out:
            warn(f"warning: {LEGACY_DATABASE_ENV} is ignored because {current} is set; "
                 f"remove {LEGACY_DATABASE_ENV}.")
        else:
            out[current] = legacy
            warn(f"warning: {LEGACY_DATABASE_ENV} is deprecated; set {current} instead "
                 "(the service reads that one too).")
    return out


def _is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


@click.command("dashboard")
@click.option("--config", "config", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Settings file (TOML), the service's: [database] and [dashboard] apply "
                   "(docs/configuration.md).")
@click.option("--host", default=None, help="Address to listen on [dashboard.host; default 127.0.0.1].")
@click.option("--port", default=None, type=click.IntRange(1, 65535),
              help="TCP port [dashboard.port; default 8050].")
@click.option("--database", default=None, metavar="URL",
              help="SQLAlchemy URL of the store [database.url; default the service's].")
@click.option("--behind-tls-proxy/--no-behind-tls-proxy", default=None,
              help="Reached through one HTTPS reverse proxy: trust its X-Forwarded-For/-Proto/-Host, "
                   "mark the session cookie Secure, send HSTS [dashboard.behind_tls_proxy; docs/security.md].")
@click.option("--limiter-storage", default=None, metavar="URL",
              help="Where failed sign-ins are counted: memory:// (this process) or redis://HOST:6379/0 "
                   "shared by several dashboard processes [dashboard.limiter_storage].")
@click.option("--time-zone", default=None, metavar="ZONE",
              help="The plant's IANA time zone, e.g. Europe/Berlin [dashboard.time_zone; default UTC].")
@click.option("--threads", default=None, type=click.IntRange(1, 256),
              help="Requests served at once [dashboard.threads; default 8].")
@click.option("--debug", is_flag=True, default=False,
              help="Serve with the framework's development server and debugger instead "
                   "(on a loopback address only; never in production).")
def dashboard(config: Path | None, host: str | None, port: int | None, database: str | None,
              behind_tls_proxy: bool | None, limiter_storage: str | None, time_zone: str | None,
              threads: int | None, debug: bool) -> None:
    """Serve the dashboard and the JSON API (waitress; put a TLS proxy in front).

    Several processes need the same session key in WHIRLWATCH_DASHBOARD_SECRET_KEY."""
    from limits.errors import ConfigurationError

    from dashboard import create_app
    from dashboard.serving import app_config
    from monitor.config import ConfigError, load_settings
    from monitor.redact import redact
    from monitor.service.logs import configure_logging
    from monitor.store.db import StoreError, make_engine, require_schema

    if config is not None and not config.is_file():
        raise click.UsageError(f"--config {str(config)!r} is not a file.")
    given = {"--host": host, "--port": port, "--database": database,
             "--behind-tls-proxy": behind_tls_proxy, "--limiter-storage": limiter_storage,
             "--time-zone": time_zone, "--threads": threads}
    try:
        settings = load_settings(config, env=environment(os.environ), overrides={
            OPTION_SETTINGS[opt]: value for opt, value in given.items()})
    except ConfigError as exc:
        raise click.ClickException(str(exc)) from None
    d = settings.dashboard
    if debug and not _is_loopback(d.host):
        raise click.UsageError(f"--debug serves the interactive debugger: use a loopback --host, not {d.host!r}.")
    try:
        require_schema(make_engine(settings.database.url))
    except StoreError as exc:
        raise click.ClickException(str(exc)) from None
    configure_logging(settings.service.log_level)
    try:
        app = create_app(app_config(settings))
    except ConfigurationError as exc:
        raise click.ClickException(
            f"dashboard.limiter_storage {redact(d.limiter_storage)!r} cannot be used: {redact(str(exc))}") from None
    if debug:
        _serve_debug(app, d.host, d.port)
    else:
        _serve(app, d.host, d.port, d.threads, d.behind_tls_proxy)


def _serve(app, host: str, port: int, threads: int, behind_tls_proxy: bool) -> None:
    from dashboard.serving import listening_port, make_server

    try:
        server = make_server(app, host, port, threads=threads, behind_tls_proxy=behind_tls_proxy)
    except OSError as exc:
        raise click.ClickException(f"cannot listen on {host}:{port}: {exc.strerror or exc}.") from None
    # SIGTERM (systemd, docker stop) ends the loop like Ctrl-C: requests under way finish.
    signal.signal(signal.SIGTERM, lambda *_: sys.exit(0))
    click.echo(f"whirlwatch dashboard on http://{host}:{listening_port(server)}/", err=True)
    server.run()


def _serve_debug(app, host: str, port: int) -> None:
    from werkzeug.serving import WSGIRequestHandler, run_simple

    from dashboard.security import SERVER_HEADER

    class Handler(WSGIRequestHandler):
        def version_string(self) -> str:
            # The Server header names no product or version (OWASP ASVS 4.0.3 V14.3.3).
            return SERVER_HEADER

    app.debug = True
    click.echo(f"whirlwatch dashboard (development server, --debug) on http://{host}:{port}/", err=True)
    run_simple(host, port, app, threaded=True, use_reloader=False, use_debugger=True,
               request_handler=Handler)
