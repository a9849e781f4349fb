"""Sign in and out; users and API tokens (admin)."""

from __future__ import annotations

from flask import Blueprint, flash, redirect, render_template, request, url_for
from sqlalchemy import select
from werkzeug.security import check_password_hash, generate_password_hash

from dashboard.db import db_session
from dashboard.errors import BadRequest, NotFound
from dashboard.security import ROLES, current, limiter, require, start_session
from monitor.store import reads
from monitor.store.auth import (
    AuthError,
    create_api_token,
    create_user,
    get_user,
    revoke_api_token_by_id,
    verify_password,
)
from monitor.store.models import ApiToken, User

bp = Blueprint("auth", __name__)

# Compared against when the user does not exist, so timing does not reveal names.
_DUMMY_HASH = generate_password_hash("not-a-real-password")


def _safe_next(target: str | None) -> str:
    if target and target.startswith("/") and not target.startswith("//"):
        return target
    return url_for("overview.index")


@bp.route("/login", methods=["GET", "POST"])
def login():
    if request.method == "GET":
        if current() is not None:
            return redirect(_safe_next(request.args.get("next")))
        return render_template("auth/login.html", next=request.args.get("next"))
    name = request.form.get("username", "").strip()
    password = request.form.get("password", "")
    addr = request.remote_addr or "-"
    limiter().check(name, addr)
    s = db_session()
    user = verify_password(s, name, password)
    if user is None and get_user(s, name) is None:
        # Spend the same hashing time as for a known name, so timing does not reveal names.
        check_password_hash(_DUMMY_HASH, password)
    if user is None:
        limiter().failed(name, addr)
        return render_template("auth/login.html", error="User name or password is wrong.",
                               username=name, next=request.form.get("next")), 401
    limiter().succeeded(name, addr)
    start_session(user)
    return redirect(_safe_next(request.form.get("next")))


@bp.post("/logout")
def logout():
    from flask import session

    session.clear()
    return redirect(url_for("auth.login"))


@bp.route("/users", methods=["GET", "POST"])
@require("admin")
def users():
    s = db_session()
    if request.method == "POST":
        name = request.form.get("username", "").strip()
        password = request.form.get("password", "")
        role = request.form.get("role", "")
        if get_user(s, name) is not None:
            flash(f"A user named {name} exists already.", "error")
            return redirect(url_for("auth.users"))
        try:
            create_user(s, name, password, role)
        except AuthError as exc:
            raise BadRequest(str(exc)) from None
        s.commit()
        flash(f"User {name} added as {role}.", "ok")
        return redirect(url_for("auth.users"))
    return render_template("auth/users.html", users=s.scalars(select(User).order_by(User.name)).all(), roles=ROLES)


@bp.post("/users/<int:user_id>/role")
@require("admin")
def set_role(user_id: int):
    s = db_session()
    u = s.get(User, user_id)
    if u is None:
        raise NotFound(f"No user with id {user_id}.")
    role = request.form.get("role", "")
    if role not in ROLES:
        raise BadRequest(f"The role must be one of {', '.join(ROLES)}, got {role!r}.")
    u.role = role
    s.commit()
    flash(f"{u.name} is now {role}.", "ok")
    return redirect(url_for("auth.users"))


@bp.route("/tokens", methods=["GET", "POST"])
@require("admin")
def tokens():
    s = db_session()
    new_token = new_user = None
    if request.method == "POST":
        try:
            uid = int(request.form.get("user_id", ""))
        except ValueError:
            raise BadRequest("Choose the user the token acts for.") from None
        u = s.get(User, uid)
        if u is None:
            raise NotFound(f"No user with id {uid}.")
        label = request.form.get("label", "").strip()[:100]
        new_token, new_user = create_api_token(s, u.name, label), u.name
        s.commit()
    resp = render_template("auth/tokens.html", tokens=reads.list_tokens(s),
                           users=s.scalars(select(User).order_by(User.name)).all(),
                           new_token=new_token, new_token_user=new_user)
    return resp


@bp.post("/tokens/<int:token_id>/revoke")
@require("admin")
def revoke_token(token_id: int):
    s = db_session()
    if s.get(ApiToken, token_id) is None:
        raise NotFound(f"No API token with id {token_id}.")
    if revoke_api_token_by_id(s, token_id):
        s.commit()
    flash("Token revoked.", "ok")
    return redirect(url_for("auth.tokens"))
