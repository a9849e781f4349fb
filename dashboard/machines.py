"""Machine page: charts and tables filled from /api/v1/machines/<id>."""

from __future__ import annotations

from flask import Blueprint, render_template

from dashboard.db import db_session
from dashboard.errors import NotFound
from dashboard.security import require
from monitor.store import reads

bp = Blueprint("machines", __name__, url_prefix="/machines")


@bp.get("/<machine_id>")
@require("viewer")
def detail(machine_id: str):
    m = reads.get_machine(db_session(), machine_id)
    if m is None:
        raise NotFound(f"No machine with id {machine_id!r}.")
    return render_template("machines/detail.html", machine=m)
