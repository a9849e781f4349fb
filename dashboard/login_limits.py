"""Failed sign-in limits, per client address and per account (Flask-Limiter).

Only failures count (answers 401): a wrong password at sign-in or a wrong current password
when changing it. Two limits apply, each a list of windows (``10 per minute; 50 per hour;
200 per day``), so a guesser who keeps going waits a minute, then an hour, then a day:

- per client address (IPv6: per /64), whatever the user names tried, so trying many
  names from one place (password spraying) is held back;
- per account, whatever the address, so guessing one user's password from many places is
  held back. A user signing in from an address where they signed in successfully before
  (:data:`monitor.store.auth.KNOWN_ADDRESSES_KEPT` kept) is not held back by it, so
  someone guessing elsewhere cannot lock them out; the address limit still applies.

The counts live in the storage ``LOGIN_LIMIT_STORAGE_URL`` names: ``memory://`` (each
process its own) or ``redis://host:6379/0`` to share them among several dashboard
processes (docs/security.md). If that storage stops answering, each process counts in
memory until it answers again. OWASP ASVS 4.0.3 V2.2.1.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from typing import Any

from flask import Flask, request
from flask_limiter import Limiter
from flask_limiter.errors import RateLimitExceeded

from dashboard.errors import TooManyAttempts, render
from dashboard.security import client_address, current

#: Scopes shared by every form that checks a password.
ADDRESS_SCOPE = "sign-in-failures-per-address"
ACCOUNT_SCOPE = "sign-in-failures-per-account"


def _failed(response) -> bool:
    return response.status_code == 401


def _login_name() -> str:
    return request.form.get("username", "").strip()


def _own_name() -> str:
    p = current()
    return p.username if p else ""


def _account_key(name_of: Callable[[], str]) -> Callable[[], str]:
    return lambda: name_of().casefold()[:100] or "-"


def _known_address(name_of: Callable[[], str]) -> Callable[[], bool]:
    def known() -> bool:
        from dashboard.db import db_session
        from monitor.store.auth import signed_in_before_from

        name = name_of()
        return bool(name) and signed_in_before_from(db_session(), name, client_address())

    return known


def install(app: Flask) -> Limiter:
    """Put the limits on the sign-in and password-change forms of ``app``."""
    cfg = app.config
    limiter = Limiter(
        client_address, app=app, storage_uri=cfg["LOGIN_LIMIT_STORAGE_URL"],
        strategy="moving-window", headers_enabled=True, key_prefix="whirlwatch",
        in_memory_fallback_enabled=True,
    )
    for endpoint, name_of in (("auth.login", _login_name), ("auth.change_password", _own_name)):
        view: Callable[..., Any] = app.view_functions[endpoint]
        view = limiter.shared_limit(
            cfg["LOGIN_LIMIT_PER_ACCOUNT"], ACCOUNT_SCOPE, key_func=_account_key(name_of),
            methods=["POST"], deduct_when=_failed, exempt_when=_known_address(name_of),
            error_message="Too many failed sign-ins for this account.")(view)
        view = limiter.shared_limit(
            cfg["LOGIN_LIMIT_PER_ADDRESS"], ADDRESS_SCOPE, methods=["POST"], deduct_when=_failed,
            error_message="Too many failed sign-ins from this address.")(view)
        app.view_functions[endpoint] = view

    @app.errorhandler(RateLimitExceeded)
    def _limited(exc: RateLimitExceeded):
        lim = limiter.current_limit
        wait = max(1, math.ceil(lim.reset_at - time.time())) if lim is not None else None
        more = f" Try again in {wait} s." if wait else " Try again later."
        return render(TooManyAttempts(f"{exc.description}{more}"))

    app.extensions["whirlwatch_login_limiter"] = limiter
    return limiter
