"""Users (admin): add, change role, disable, re-enable, delete, reset a password.

Every change goes through :mod:`monitor.store.auth`, which ends the user's sessions where
the change calls for it and writes the audit row (OWASP ASVS 4.0.3 V7.1.3, V8.3.x).
"""

from __future__ import annotations

from flask import Blueprint, flash, redirect, render_template, request, url_for
from sqlalchemy import select

from dashboard.db import db_session
from dashboard.errors import BadRequest, Conflict, NotFound
from dashboard.security import ROLES, actor, require
from monitor.store.auth import (
    AuthError,
    LastAdminError,
    create_user,
    delete_user,
    set_disabled,
    set_password,
    set_role,
)
from monitor.store.models import User
from monitor.store.reads import get_user

bp = Blueprint("users", __name__, url_prefix="/users")


def _user(user_id: int) -> User:
    u = db_session().get(User, user_id)
    if u is None:
        raise NotFound(f"No user with id {user_id}.")
    return u


def _done(message: str):
    db_session().commit()
    flash(message, "ok")
    return redirect(url_for("users.index"))


@bp.route("/", methods=["GET", "POST"], strict_slashes=False)
@require("admin")
def index():
    s = db_session()
    if request.method == "POST":
        name = request.form.get("username", "").strip()
        password = request.form.get("password", "")
        role = request.form.get("role", "")
        if get_user(s, name) is not None:
            raise Conflict(f"A user named {name!r} exists already.")
        try:
            create_user(s, name, password, role, actor())
        except AuthError as exc:
            raise BadRequest(f"The user was not added: {exc}") from None
        return _done(f"User {name} added as {role}.")
    users = s.scalars(select(User).order_by(User.name)).all()
    return render_template("auth/users.html", users=users, roles=ROLES)


@bp.post("/<int:user_id>/role")
@require("admin")
def role(user_id: int):
    u = _user(user_id)
    new = request.form.get("role", "")
    try:
        changed = set_role(db_session(), u, new, actor())
    except LastAdminError as exc:
        raise Conflict(f"The role was not changed: {exc}") from None
    except AuthError as exc:
        raise BadRequest(f"The role was not changed: {exc}") from None
    return _done(f"{u.name} is now {new}." if changed else f"{u.name} was {new} already.")


@bp.post("/<int:user_id>/disable")
@require("admin")
def disable(user_id: int):
    u = _user(user_id)
    try:
        set_disabled(db_session(), u, True, actor())
    except LastAdminError as exc:
        raise Conflict(f"The user was not disabled: {exc}") from None
    return _done(f"{u.name} is disabled: signed out, and their API tokens stop working.")


@bp.post("/<int:user_id>/enable")
@require("admin")
def enable(user_id: int):
    u = _user(user_id)
    set_disabled(db_session(), u, False, actor())
    return _done(f"{u.name} is enabled again.")


@bp.post("/<int:user_id>/delete")
@require("admin")
def delete(user_id: int):
    u = _user(user_id)
    name = u.name
    try:
        delete_user(db_session(), u, actor())
    except LastAdminError as exc:
        raise Conflict(f"The user was not deleted: {exc}") from None
    return _done(f"{name} is deleted with their API tokens; the audit trail keeps their history.")


@bp.post("/<int:user_id>/password")
@require("admin")
def reset_password(user_id: int):
    u = _user(user_id)
    try:
        set_password(db_session(), u, request.form.get("password", ""), actor())
    except AuthError as exc:
        raise BadRequest(f"The password was not reset: {exc}") from None
    return _done(f"The password of {u.name} is reset and their sessions are signed out.")
