"""API tokens (admin): create one for a user (shown once), list, revoke."""

from __future__ import annotations

from flask import Blueprint, flash, redirect, render_template, request, url_for
from sqlalchemy import select

from dashboard.db import db_session
from dashboard.errors import BadRequest, NotFound
from dashboard.security import actor, require
from monitor.store.auth import create_api_token, revoke_api_token_by_id
from monitor.store.models import ApiToken, User
from monitor.store.reads import list_api_tokens

bp = Blueprint("tokens", __name__, url_prefix="/tokens")


@bp.route("/", methods=["GET", "POST"], strict_slashes=False)
@require("admin")
def index():
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
        new_token = create_api_token(s, u.name, label, actor())
        new_user = u.name
        s.commit()
    return render_template("auth/tokens.html", tokens=list_api_tokens(s),
                           users=s.scalars(select(User).order_by(User.name)).all(),
                           new_token=new_token, new_token_user=new_user)


@bp.post("/<int:token_id>/revoke")
@require("admin")
def revoke(token_id: int):
    s = db_session()
    if s.get(ApiToken, token_id) is None:
        raise NotFound(f"No API token with id {token_id}.")
    if revoke_api_token_by_id(s, token_id, actor()):
        s.commit()
    flash("Token revoked.", "ok")
    return redirect(url_for("tokens.index"))
