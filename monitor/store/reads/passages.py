"""Reads of the stored passages: the one JSON shape of a passage (REST API and machine
page), a machine's passages newest first, one passage of a machine."""

from __future__ import annotations

from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from monitor.model.timefmt import iso_utc
from monitor.store.models import PassageRow


def passage_json(p: PassageRow, *, with_points: bool = True) -> dict[str, Any]:
    """The passage in the JSON shape of the REST API (docs/api.md): times ISO 8601 UTC,
    frequencies in Hz, the 1x amplitude in ``unit`` (peak), phases in degrees; ``mode``
    and ``shift_pct`` of the stored mode it matched; ``candidate`` null, or what became of
    it as a candidate mode; ``points`` its sweep's Bode points (left out without
    ``with_points``)."""
    out: dict[str, Any] = {
        "id": p.id,
        "machine": p.machine_id,
        "point": p.point_id,
        "kind": p.kind,
        "method": p.method,
        "started_at": iso_utc(p.started_at),
        "ended_at": iso_utc(p.ended_at),
        "detected_at": iso_utc(p.detected_at),
        "natural_frequency_hz": p.natural_frequency_hz,
        "critical_speed_hz": p.critical_speed_hz,
        "amplification_factor": p.amplification_factor,
        "damping_ratio": p.damping_ratio,
        "peak_amplitude": p.peak_amplitude,
        "unit": p.unit,
        "phase_at_peak_deg": p.phase_at_peak_deg,
        "phase_change_deg": p.phase_change_deg,
        "mode": p.mode,
        "shift_pct": p.shift_pct,
        "candidate": None if p.candidate is None else {
            "state": p.candidate, "decided_by": p.decided_by,
            "decided_at": iso_utc(p.decided_at), "mode": p.accepted_mode},
    }
    if with_points:
        out["points"] = list(p.points or [])
    return out


def find_passages(s: Session, machine_id: str, *, before_id: int | None = None, limit: int = 50
                  ) -> tuple[list[PassageRow], int | None]:
    """A machine's passages newest first; keyset pagination on id. Returns (rows, next
    ``before_id``)."""
    q = select(PassageRow).where(PassageRow.machine_id == machine_id)
    if before_id is not None:
        q = q.where(PassageRow.id < before_id)
    rows = s.scalars(q.order_by(PassageRow.id.desc()).limit(limit + 1)).all()
    nxt = rows[limit - 1].id if len(rows) > limit else None
    return list(rows[:limit]), nxt


def get_passage(s: Session, machine_id: str, passage_id: int) -> PassageRow | None:
    """Passage ``passage_id`` of machine ``machine_id``, or None."""
    p = s.get(PassageRow, passage_id)
    return p if p is not None and p.machine_id == machine_id else None
