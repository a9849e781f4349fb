"""Who is asking, and what they may do: sessions, API tokens, roles, response headers.

Reads need a signed-in session or an API token (``Authorization: Bearer <token>``);
writes need the engineer role (admin includes engineer). Session-authenticated API
writes must carry the CSRF token in the ``X-CSRFToken`` header; token-authenticated
requests are exempt because a browser never attaches a bearer token on its own.

A session holds the user's id and their ``session_version`` at sign-in; the version is
checked against the database on every request, so sign-out, a password change, a role
change or disabling the user ends every session of theirs at once (OWASP ASVS 4.0.3
V3.3.1, V3.3.3, V3.3.4).
"""

from __future__ import annotations

import functools
import ipaddress
from collections.abc import Callable
from dataclasses import dataclass

from flask import Flask, g, has_request_context, request, session
from flask.sessions import SecureCookieSessionInterface
from sqlalchemy.exc import OperationalError

from dashboard.errors import Forbidden, Unauthorised
from monitor.store.audit import Actor

ROLES = ("viewer", "engineer", "admin")
_RANK = {r: i for i, r in enumerate(ROLES)}

CSP = (
    "default-src 'self'; script-src 'self'; style-src 'self'; img-src 'self' data:; "
    "connect-src 'self'; font-src 'self'; object-src 'none'; base-uri 'none'; "
    "form-action 'self'; frame-ancestors 'none'"
)
#: HSTS lifetime, s: one year (RFC 6797 leaves it to the site; a year is common practice).
HSTS_MAX_AGE_S = 365 * 86400
#: What the ``Server`` header says: no product or version (OWASP ASVS 4.0.3 V14.3.3). The
#: HTTP server writes that header, not the app: ``whirlwatch dashboard`` sets it.
SERVER_HEADER = "whirlwatch"


@dataclass(frozen=True)
class Principal:
    """The authenticated caller for this request."""

    user_id: int
    username: str
    role: str
    via: str  # "session" or "token"

    def has(self, role: str) -> bool:
        return _RANK[self.role] >= _RANK[role]


def current() -> Principal | None:
    return g.get("principal")


def client_address() -> str:
    """The client's address (the proxy's X-Forwarded-For when the dashboard is set to run
    behind one); an IPv6 address as its /64 network, the block one host usually holds."""
    addr = request.remote_addr or "-"
    try:
        ip = ipaddress.ip_address(addr)
    except ValueError:
        return addr
    if isinstance(ip, ipaddress.IPv6Address):
        if ip.ipv4_mapped is not None:
            return str(ip.ipv4_mapped)
        return str(ipaddress.ip_network(f"{ip}/64", strict=False))
    return str(ip)


def actor(name: str | None = None) -> Actor:
    """Who acts, for the audit trail: user ``name`` (default: the signed-in user) and the
    client's full address."""
    p = current()
    return Actor(name or (p.username if p else "-"), request.remote_addr or "-")


def require(role: str = "viewer") -> Callable:
    """Decorator: the caller must be authenticated with at least ``role``."""

    def deco(view: Callable) -> Callable:
        @functools.wraps(view)
        def wrapped(*args, **kwargs):
            p = current()
            if p is None:
                if request.path.startswith("/api/"):
                    raise Unauthorised("Sign in or send a valid API token as 'Authorization: Bearer <token>'.")
                from flask import redirect, url_for

                return redirect(url_for("auth.login", next=request.full_path.rstrip("?")))
            if not p.has(role):
                raise Forbidden(f"This needs the {role} role; you are signed in as {p.role}.")
            return view(*args, **kwargs)

        return wrapped

    return deco


class SessionInterface(SecureCookieSessionInterface):
    """Flask's signed-cookie session whose cookie is ``Secure`` whenever the request came
    over HTTPS, not only when configured so (OWASP ASVS 4.0.3 V3.4.1)."""

    def get_cookie_secure(self, app: Flask) -> bool:
        return bool(app.config["SESSION_COOKIE_SECURE"]) or (has_request_context() and request.is_secure)


def start_session(user) -> None:
    """Sign ``user`` in on this browser: a fresh session carrying their session version."""
    session.clear()
    session["uid"] = user.id
    session["ver"] = user.session_version
    session.permanent = True


def register(app: Flask) -> None:
    """Load the caller before each request and set security headers after it."""
    from dashboard.db import db_session
    from monitor.store.auth import verify_api_token
    from monitor.store.reads import active_user

    csrf = app.extensions["csrf"]
    app.session_interface = SessionInterface()

    @app.before_request
    def _load_principal() -> None:
        g.principal = None
        auth = request.headers.get("Authorization", "")
        if request.path.startswith("/api/") and auth:
            scheme, _, token = auth.partition(" ")
            if scheme.lower() != "bearer" or not token.strip():
                raise Unauthorised("The Authorization header must be 'Bearer <token>'.")
            s = db_session()
            user = verify_api_token(s, token.strip())
            if user is None:
                raise Unauthorised("The API token is not valid or has been revoked.")
            try:
                s.commit()  # the time of use the store stamped
            except OperationalError:
                # The stamp is a convenience (to LAST_USE_RESOLUTION); a read must not fail
                # because the service held SQLite's lock at that moment.
                s.rollback()
            g.principal = Principal(user.id, user.name, user.role, "token")
            return
        uid = session.get("uid")
        if uid is not None:
            user = active_user(db_session(), uid)
            # A session from before a sign-out, password or role change ends here.
            if user is None or session.get("ver") != user.session_version:
                session.clear()
            else:
                g.principal = Principal(user.id, user.name, user.role, "session")
        # Only a signed-in session can be ridden by a forged request: an anonymous write
        # gets the view's own 401 (or the router's 404/405), not a CSRF refusal.
        if (g.principal is not None and request.path.startswith("/api/")
                and request.method not in ("GET", "HEAD", "OPTIONS")):
            csrf.protect()

    @app.after_request
    def _headers(resp):
        resp.headers.setdefault("Content-Security-Policy", CSP)
        resp.headers["X-Content-Type-Options"] = "nosniff"
        resp.headers["X-Frame-Options"] = "DENY"
        resp.headers["Referrer-Policy"] = "same-origin"
        if app.config["BEHIND_TLS_PROXY"] or request.is_secure:
            resp.headers["Strict-Transport-Security"] = f"max-age={HSTS_MAX_AGE_S}"
        if request.path.startswith("/api/") or current() is not None:
            resp.headers.setdefault("Cache-Control", "no-store")
        return resp
