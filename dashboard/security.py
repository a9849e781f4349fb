"""Who is asking, and what they may do: sessions, API tokens, roles, headers, login limiter.

Reads need a signed-in session or an API token (``Authorization: Bearer <token>``);
writes need the engineer role (admin includes engineer). Session-authenticated API
writes must carry the CSRF token in the ``X-CSRFToken`` header; token-authenticated
requests are exempt because a browser never attaches a bearer token on its own.
"""

from __future__ import annotations

import functools
import threading
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass

from flask import Flask, current_app, g, request, session

from dashboard.errors import Forbidden, TooManyAttempts, Unauthorised

ROLES = ("viewer", "engineer", "admin")
_RANK = {r: i for i, r in enumerate(ROLES)}


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


class LoginLimiter:
    """Sliding-window count of failed logins per (username, client address).

    In-process only: enough for one dashboard process; several processes each keep
    their own window, which still bounds guessing to a small multiple.
    """

    def __init__(self, max_failures: int, window_s: float, clock: Callable[[], float] = time.monotonic) -> None:
        self.max_failures = max_failures
        self.window_s = window_s
        self._clock = clock
        self._fails: dict[tuple[str, str], deque[float]] = {}
        self._lock = threading.Lock()

    def _prune(self, key: tuple[str, str]) -> deque[float]:
        q = self._fails.setdefault(key, deque())
        cutoff = self._clock() - self.window_s
        while q and q[0] < cutoff:
            q.popleft()
        return q

    def check(self, username: str, addr: str) -> None:
        with self._lock:
            q = self._prune((username.lower(), addr))
            if len(q) >= self.max_failures:
                wait = int(q[0] + self.window_s - self._clock()) + 1
                raise TooManyAttempts(f"Too many failed sign-ins for this user from this address; try again in {wait} s.")

    def failed(self, username: str, addr: str) -> None:
        with self._lock:
            self._prune((username.lower(), addr)).append(self._clock())

    def succeeded(self, username: str, addr: str) -> None:
        with self._lock:
            self._fails.pop((username.lower(), addr), None)


CSP = (
    "default-src 'self'; script-src 'self'; style-src 'self'; img-src 'self' data:; "
    "connect-src 'self'; font-src 'self'; object-src 'none'; base-uri 'none'; "
    "form-action 'self'; frame-ancestors 'none'"
)


def register(app: Flask) -> None:
    """Load the caller before each request and set security headers after it."""
    from dashboard.db import db_session
    from monitor.store import reads
    from monitor.store.auth import verify_api_token

    csrf = app.extensions["csrf"]

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
            s.commit()  # the check stamps the token's time of use
            if user is None:
                raise Unauthorised("The API token is not valid or has been revoked.")
            g.principal = Principal(user.id, user.name, user.role, "token")
            return
        uid = session.get("uid")
        if uid is not None:
            user = reads.user_by_id(db_session(), uid)
            # A session for a deleted or re-keyed user ends here.
            if user is None or session.get("gen") != _session_generation(user):
                session.clear()
            else:
                g.principal = Principal(user.id, user.name, user.role, "session")
        if request.path.startswith("/api/") and request.method not in ("GET", "HEAD", "OPTIONS"):
            csrf.protect()

    @app.after_request
    def _headers(resp):
        resp.headers.setdefault("Content-Security-Policy", CSP)
        resp.headers["X-Content-Type-Options"] = "nosniff"
        resp.headers["X-Frame-Options"] = "DENY"
        resp.headers["Referrer-Policy"] = "same-origin"
        if request.path.startswith("/api/") or current() is not None:
            resp.headers.setdefault("Cache-Control", "no-store")
        return resp


def _session_generation(user) -> str:
    # Changing the password hash invalidates existing sessions.
    return (user.password_hash or "")[-12:]


def start_session(user) -> None:
    session.clear()
    session["uid"] = user.id
    session["gen"] = _session_generation(user)
    session.permanent = True


def limiter() -> LoginLimiter:
    return current_app.extensions["whirlwatch_login_limiter"]
