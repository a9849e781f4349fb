"""Sign in, sign out, and change one's own password.

Failed attempts are counted by :mod:`dashboard.login_limits` (it wraps ``login`` and
``change_password``); both answer 401 on a wrong password so it can tell.
"""

from __future__ import annotations

import logging

from flask import Blueprint, flash, redirect, render_template, request, session, url_for

from dashboard.db import db_session
from dashboard.errors import BadRequest
from dashboard.redirects import next_or_home, same_origin_path
from dashboard.security import actor, current, require, start_session
from monitor.store.auth import (
    AuthError,
    password_matches,
    set_password,
    sign_in,
    sign_out,
    verify_password,
)
from monitor.store.reads import active_user

bp = Blueprint("auth", __name__)
log = logging.getLogger(__name__)


def _home() -> str:
    return url_for("overview.index")


@bp.route("/login", methods=["GET", "POST"])
def login():
    if request.method == "GET":
        # OWASP ASVS 4.0.3 V5.1.5: redirects only to a path on this site.
        if current() is not None:
            return redirect(next_or_home(request.args.get("next"), _home()))
        return render_template("auth/login.html", next=same_origin_path(request.args.get("next")))
    name = request.form.get("username", "").strip()
    password = request.form.get("password", "")
    s = db_session()
    user = verify_password(s, name, password)
    if user is None:
        log.warning("sign-in failed", extra={"user": name[:100], "address": request.remote_addr})
        return render_template("auth/login.html", error="User name or password is wrong.", username=name,
                               next=same_origin_path(request.form.get("next"))), 401
    sign_in(s, user, actor(user.name))
    s.commit()
    start_session(user)
    return redirect(next_or_home(request.form.get("next"), _home()))


@bp.post("/logout")
def logout():
    p = current()
    if p is not None:
        s = db_session()
        user = active_user(s, p.user_id)
        if user is not None:
            # Ends every session of the user, so a copy of this cookie stops working too.
            sign_out(s, user, actor())
            s.commit()
    session.clear()
    return redirect(url_for("auth.login"))


@bp.route("/account/password", methods=["GET", "POST"])
@require("viewer")
def change_password():
    if request.method == "GET":
        return render_template("auth/password.html")
    s = db_session()
    user = active_user(s, current().user_id)
    if user is None:  # pragma: no cover - require() loaded this user a moment ago
        return redirect(url_for("auth.login"))
    if not password_matches(user, request.form.get("current_password", "")):
        return render_template("auth/password.html", error="The current password is wrong."), 401
    new = request.form.get("new_password", "")
    if new != request.form.get("new_password_again", ""):
        raise BadRequest("The two new passwords differ; type the same one twice.")
    try:
        set_password(s, user, new, actor())
    except AuthError as exc:
        raise BadRequest(f"The new password was refused: {exc}") from None
    s.commit()
    # Every other session of the user has ended; this browser stays signed in.
    start_session(user)
    flash("Password changed; your other sessions were signed out.", "ok")
    return redirect(_home())
