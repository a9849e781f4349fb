"""Serving the dashboard: its Flask settings from the settings registry, and the production
HTTP server (waitress, pure Python, threads).

``whirlwatch dashboard`` and ``whirlwatch demo`` both serve through :func:`make_server`, so
the response headers the HTTP server writes (``Server``, docs/security.md) and the handling
of proxy headers are the same wherever the dashboard runs. The framework's development
server is only for ``whirlwatch dashboard --debug``.
"""

from __future__ import annotations

import threading
from typing import Any

from flask import Flask
from waitress import wasyncore
from waitress.server import BaseWSGIServer, MultiSocketServer, create_server
from waitress.trigger import trigger as Trigger

from dashboard.security import SERVER_HEADER
from monitor.settings import Settings

Server = BaseWSGIServer | MultiSocketServer


def app_config(settings: Settings) -> dict[str, Any]:
    """The :func:`dashboard.create_app` settings that ``settings`` (the registry's
    ``[database]``, ``[dashboard]`` and ``alarms.max_shelve_hours``) give."""
    d = settings.dashboard
    config: dict[str, Any] = {
        "DATABASE_URL": settings.database.url,
        "DATABASE_BUSY_TIMEOUT_MS": settings.database.busy_timeout_ms,
        "BEHIND_TLS_PROXY": d.behind_tls_proxy,
        "LOGIN_LIMIT_STORAGE_URL": d.limiter_storage,
        "TIME_ZONE": d.time_zone,
        "MAX_SHELVE_HOURS": settings.alarms.max_shelve_hours,
    }
    if d.secret_key:
        config["SECRET_KEY"] = d.secret_key
    return config


def make_server(app: Flask, host: str, port: int, *, threads: int = 8,
                behind_tls_proxy: bool = False) -> Server:
    """A waitress server for ``app`` listening on ``host``:``port`` (0: any free port),
    not yet running; ``run()`` serves until interrupted.

    The ``Server`` header names no product or version (OWASP ASVS 4.0.3 V14.3.3). Waitress
    removes X-Forwarded-* headers before the app sees them, except behind the TLS proxy,
    where the app itself trusts one hop of them (``BEHIND_TLS_PROXY``, werkzeug's
    ProxyFix). Raises OSError when the address cannot be bound.
    """
    return create_server(
        app, host=host, port=port, threads=threads, ident=SERVER_HEADER,
        clear_untrusted_proxy_headers=not behind_tls_proxy,
    )


def listening_port(server: Server) -> int:
    """The TCP port ``server`` listens on (the first, when it listens on several)."""
    if isinstance(server, MultiSocketServer):
        return int(server.effective_listen[0][1])
    return int(getattr(server, "effective_port"))  # noqa: B009 - set by waitress, not in its stubs


class ServerThread:
    """A :func:`make_server` server running in a background thread until :meth:`stop`."""

    def __init__(self, server: Server) -> None:
        self.server = server
        self.port = listening_port(server)
        self._thread = threading.Thread(target=server.run, name="dashboard", daemon=True)
        self._thread.start()

    def stop(self, timeout_s: float = 10.0) -> None:
        """Close the listening socket and every connection, then end the worker threads."""
        socket_map: dict[int, Any] = getattr(self.server, "map", None) or getattr(self.server, "_map")  # noqa: B009
        # The loop thread owns the socket map: hand it the closing, through its trigger.
        trigger: Any = next(d for d in socket_map.values() if isinstance(d, Trigger))
        trigger.pull_trigger(lambda: wasyncore.close_all(socket_map))
        self._thread.join(timeout_s)
        self.server.task_dispatcher.shutdown(timeout=round(timeout_s))
