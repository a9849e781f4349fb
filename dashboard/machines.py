"""Machine page: charts and tables filled from /api/v1/machines/<id>; the passages of its
run-ups and coast-downs, with the forms that accept or reject a candidate mode."""

from __future__ import annotations

from flask import Blueprint, flash, redirect, render_template, request, url_for

from dashboard.alarms import acting_user, with_words
from dashboard.db import db_session, machine_or_404
from dashboard.errors import BadRequest, Conflict, NotFound
from dashboard.security import require
from monitor.model.registry import RegistryError
from monitor.store import reads
from monitor.store.candidates import (
    CandidateDecided,
    accept_candidate,
    default_mode_name,
    reject_candidate,
)
from monitor.store.models import PassageRow

bp = Blueprint("machines", __name__, url_prefix="/machines")

#: Passages listed on the machine page (the newest; the API pages through all).
PAGE_PASSAGES = 20
#: Alarms in the machine page's alarm history (the newest; the alarms page has all).
PAGE_ALARMS = 50


@bp.get("/<machine_id>")
@require("viewer")
def detail(machine_id: str):
    s = db_session()
    m = machine_or_404(machine_id)
    passages = [reads.passage_json(p, with_points=False)
                for p in reads.find_passages(s, m.id, limit=PAGE_PASSAGES)[0]]
    alarms = [with_words(reads.alarm_json(a)) for a in reads.find_alarms(s, machine=m.id, limit=PAGE_ALARMS)[0]]
    return render_template("machines/detail.html", machine=m, passages=passages, alarms=alarms)


def decide_candidate(machine_id: str, passage_id: int, *, accept: bool, name: str | None = None) -> PassageRow:
    """Accept (as a registry mode named ``name``, or the default name) or reject the
    candidate mode of passage ``passage_id``, for the signed-in engineer, and commit.
    NotFound, Conflict (no open candidate, a mode of that name exists) or BadRequest."""
    s = db_session()
    m = machine_or_404(machine_id)
    p = reads.get_passage(s, m.id, passage_id)
    if p is None:
        raise NotFound(f"Machine {m.id!r} has no passage with id {passage_id}.")
    try:
        if accept:
            chosen = (name or "").strip() or default_mode_name(p)
            if reads.mode_named(s, m.id, chosen) is not None:
                raise Conflict(f"Machine {m.id!r} already has a mode named {chosen!r}.")
            accept_candidate(s, m, p, chosen, acting_user())
        else:
            reject_candidate(s, p, acting_user())
    except CandidateDecided as exc:
        raise Conflict(str(exc)) from None
    except RegistryError as exc:
        raise BadRequest(str(exc)) from None
    s.commit()
    return p


@bp.post("/<machine_id>/candidates/<int:passage_id>/accept")
@require("engineer")
def accept(machine_id: str, passage_id: int):
    p = decide_candidate(machine_id, passage_id, accept=True, name=request.form.get("name"))
    flash(f"Mode {p.accepted_mode!r} added to the registry from passage {p.id}.", "ok")
    return redirect(url_for("machines.detail", machine_id=machine_id) + "#passages")


@bp.post("/<machine_id>/candidates/<int:passage_id>/reject")
@require("engineer")
def reject(machine_id: str, passage_id: int):
    p = decide_candidate(machine_id, passage_id, accept=False)
    flash(f"Candidate mode of passage {p.id} rejected.", "ok")
    return redirect(url_for("machines.detail", machine_id=machine_id) + "#passages")
