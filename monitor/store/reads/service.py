"""What a starting service reads from the store besides the detector states."""

from __future__ import annotations

from typing import Any, NamedTuple

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from monitor.store.models import (
    DetectorState,
    Machine,
    MachineStatus,
    Measurement,
    PassageTrackerState,
)
from monitor.store.reads.alarms import machines_with_open_alarms


class StartState(NamedTuple):
    """Where the stored readings stand and what a starting service must settle."""

    #: The latest stored waveform time per (machine, point), epoch s.
    last_ts: dict[tuple[str, str], float]
    #: Machines with alarms open (some may be of a mode or point since taken out).
    with_open_alarms: list[str]
    #: Retired machines whose alarms and status nobody has closed yet.
    unretired: list[str]
    #: The stored retained status bodies (monitor/store/statuses.py), to carry on from.
    statuses: list[dict[str, Any]]


def start_state(s: Session) -> StartState:
    """The latest stored waveform of each stream, the machines with alarms open, the
    retired machines not yet settled and the stored statuses (four statements)."""
    rows = s.execute(
        select(Measurement.machine_id, Measurement.point_id, func.max(Measurement.ts))
        .group_by(Measurement.machine_id, Measurement.point_id)
    ).all()
    retired = s.execute(
        select(DetectorState.machine_id, DetectorState.state["retired"].as_boolean())
        .join(Machine, Machine.id == DetectorState.machine_id)
        .where(Machine.active.is_(False))
    ).all()
    return StartState(
        last_ts={(m, p): ts.timestamp() for m, p, ts in rows if ts is not None},
        with_open_alarms=machines_with_open_alarms(s),
        unretired=[m for m, done in retired if not done],
        statuses=[dict(b) for b in s.scalars(select(MachineStatus.status))],
    )


def passage_tracker_state(s: Session, machine: str) -> Any:
    """The stored state of ``machine``'s passage trackers (monitor/service/passages.py),
    or None."""
    return s.execute(
        select(PassageTrackerState.state).where(PassageTrackerState.machine_id == machine)
    ).scalar_one_or_none()
