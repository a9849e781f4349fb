"""``whirlwatch dashboard``: serve the web dashboard and JSON API."""

from __future__ import annotations

import click


@click.command("dashboard")
@click.option("--host", default="127.0.0.1", show_default=True, help="Address to listen on.")
@click.option("--port", default=8050, show_default=True, type=click.IntRange(1, 65535), help="TCP port.")
@click.option("--database", "database", default="sqlite:///whirlwatch.sqlite", show_default=True,
              envvar="WHIRLWATCH_DATABASE", help="SQLAlchemy URL of the store.")
def dashboard(host: str, port: int, database: str) -> None:
    """Serve the dashboard and the JSON API (threaded server; put a TLS proxy in front)."""
    from werkzeug.serving import run_simple

    from dashboard import create_app
    from monitor.store.db import StoreError, make_engine, require_schema

    try:
        require_schema(make_engine(database))
    except StoreError as exc:
        raise click.ClickException(str(exc)) from None
    app = create_app({"DATABASE_URL": database})
    click.echo(f"whirlwatch dashboard on http://{host}:{port}/", err=True)
    run_simple(host, port, app, threaded=True, use_reloader=False, use_debugger=False)
