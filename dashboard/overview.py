"""Plant overview page: the table itself is filled from /api/v1/machines."""

from __future__ import annotations

from flask import Blueprint, current_app, render_template

from dashboard.security import require

bp = Blueprint("overview", __name__)


@bp.get("/")
@require("viewer")
def index():
    return render_template("overview/index.html", refresh_s=current_app.config["OVERVIEW_REFRESH_S"])
