"""The batch writer's passage rows (monitor/service/batch.py), inside the caller's
transaction: the passages a point's sweep gave and the passage trackers' state. Statements
and helpers are those of monitor/store/writes.py."""
from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from sqlalchemy import Connection
from sqlalchemy.dialects import postgresql, sqlite
from sqlalchemy.orm import Session

from monitor.model.timefmt import iso_utc
from monitor.modes.passage_tracker import SweepPassages
from monitor.modes.shift import ModeShift
from monitor.store.models import PassageTrackerState, utcnow
from monitor.store.writes import cached_statement, dialect_name, finite_or_none, to_datetime


def save_passage_trackers(session: Session | Connection, states: Mapping[str, Mapping[str, Any]]) -> None:
    """Upsert the passage trackers' state of several machines (``{machine: state}``,
    monitor/service/passages.py: plain JSON, finite floats only) with one statement,
    inside the caller's transaction."""
    if not states:
        return
    dialect = dialect_name(session)
    ins_mod = postgresql if dialect == "postgresql" else sqlite

    def build() -> Any:
        stmt = ins_mod.insert(PassageTrackerState.__table__)
        return stmt.on_conflict_do_update(
            index_elements=["machine_id"],
            set_={"state": stmt.excluded.state, "updated_at": stmt.excluded.updated_at})

    now = utcnow()
    session.execute(cached_statement(("save_passage_trackers", dialect), build), [
        {"machine_id": m, "state": state, "updated_at": now} for m, state in sorted(states.items())])


def passage_values(machine: str, point: str, sp: SweepPassages, seq: int, detected_at: float,
                   shift: ModeShift | None) -> dict[str, Any]:
    """The ``passages`` row of passage ``seq`` of sweep ``sp`` at ``point``, found by the
    reading at ``detected_at`` (epoch s): with the stored mode that claimed it and its
    shift, or a candidate mode ('open') when ``shift`` is None; the sweep's Bode points
    (``[{"ts", "speed_hz", "amplitude", "phase_deg"}]``, phase unwrapped along the sweep)."""
    p, sweep, bode = sp.passages[seq], sp.sweep, sp.bode
    points: list[dict[str, Any]] = []
    if bode is not None:
        used = [q for q in sweep.points if q.amplitude is not None]
        phase = bode.phase_deg
        points = [{"ts": iso_utc(q.ts, timespec="milliseconds"), "speed_hz": float(bode.speed_hz[i]),
                   "amplitude": float(bode.amplitude[i]),
                   "phase_deg": None if phase is None else float(phase[i])} for i, q in enumerate(used)]
    return {
        "machine_id": machine, "point_id": point, "seq": seq, "kind": sweep.kind, "method": sp.method,
        "started_at": to_datetime(sweep.started_at), "ended_at": to_datetime(sweep.ended_at),
        "detected_at": to_datetime(detected_at), "natural_frequency_hz": p.frequency_hz,
        "critical_speed_hz": p.critical_speed_hz, "amplification_factor": p.amplification_factor,
        "damping_ratio": p.damping_ratio, "peak_amplitude": p.peak_amplitude,
        "unit": bode.unit if bode is not None else "", "phase_at_peak_deg": finite_or_none(p.phase_at_peak_deg),
        "phase_change_deg": finite_or_none(p.phase_change_deg), "mode": None if shift is None else shift.mode,
        "shift_pct": None if shift is None else finite_or_none(shift.shift_pct), "points": points,
        "candidate": "open" if shift is None else None,
        "decided_by": None, "decided_at": None, "accepted_mode": None,
    }
