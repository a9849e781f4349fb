"""The running speed people see: the newest of a machine's speed readings (speed topic or
tach) and of its readings that sensor health accepted (docs/api.md, "Running speed").

Resonance depends on speed alone, and the detector takes it from the same two sources (a
flagged reading's speed is not used, docs/alarms.md): so the overview, the machine page,
the margin table and the resonance map stay current from the speed stream while a
vibration sensor is faulted or absent.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable
from typing import Any, NamedTuple

from sqlalchemy import select
from sqlalchemy.orm import Session, aliased

from monitor.model.timefmt import iso_utc
from monitor.store.models import Machine, Measurement, SpeedReadingRow

#: ``speed_source`` of a speed from the machine's speed topic (a tach or a drive).
SPEED_TOPIC = "speed_topic"

#: The first check sensor health failed on a stored reading (SQL; NULL when it passed every
#: check, or was stored without health): the stored health is ``{"flags": [{"check": ...}]}``.
FIRST_FLAG = Measurement.health[("flags", 0, "check")].as_string()


def health_flags(health: Any) -> list[str]:
    """The checks sensor health failed on a stored reading (``Measurement.health``), in
    order; empty when it passed every check."""
    flags = health.get("flags") if isinstance(health, dict) else None
    return [str(f.get("check")) for f in flags or () if isinstance(f, dict)]


class SpeedCandidate(NamedTuple):
    """A reading's speed as a candidate for the running speed: ``accepted`` when sensor
    health flagged nothing; ``reading`` the stored measurement it came from."""

    ts: dt.datetime
    speed_hz: float | None
    speed_source: str | None
    accepted: bool
    reading: Any = None


class RunningSpeed(NamedTuple):
    """A machine's running speed (Hz) at ``at``, from ``source`` (:data:`SPEED_TOPIC`, or a
    reading's ``measured``/``estimated``); ``reading`` the measurement it came from (its
    stored margin table is at this speed), None for the speed topic."""

    speed_hz: float | None = None
    at: dt.datetime | None = None
    source: str | None = None
    reading: Any = None

    def to_json(self) -> dict[str, Any]:
        """``speed_hz``, ``speed_rpm``, ``speed_at`` (ISO 8601 UTC), ``speed_source``."""
        return {"speed_hz": self.speed_hz, "speed_rpm": None if self.speed_hz is None else self.speed_hz * 60.0,
                "speed_at": iso_utc(self.at), "speed_source": self.source}


def running_speed(readings: Iterable[SpeedCandidate], speed_reading: tuple[dt.datetime, float] | None
                  ) -> RunningSpeed:
    """The newest of the accepted readings' speeds and the newest speed reading
    (``(ts, Hz)``); the speed reading on a tie (a tach measures; a reading may estimate)."""
    best = max((r for r in readings if r.accepted and r.speed_hz is not None), key=lambda r: r.ts, default=None)
    if speed_reading is not None and (best is None or speed_reading[0] >= best.ts):
        return RunningSpeed(float(speed_reading[1]), speed_reading[0], SPEED_TOPIC)
    if best is not None:
        return RunningSpeed(best.speed_hz, best.ts, best.speed_source, best.reading)
    return RunningSpeed()


def latest_speed_readings(s: Session, machine_id: str | None = None) -> dict[str, tuple[dt.datetime, float]]:
    """The newest speed reading ``(ts, Hz)`` of every active machine (or of one), in one
    statement (an indexed lookup per machine)."""
    inner = aliased(SpeedReadingRow)
    newest = (select(inner.id).where(inner.machine_id == Machine.id).order_by(inner.ts.desc()).limit(1)
              .correlate(Machine).scalar_subquery())
    q = (select(SpeedReadingRow.machine_id, SpeedReadingRow.ts, SpeedReadingRow.speed_hz)
         .join(Machine, SpeedReadingRow.id == newest).where(Machine.active.is_(True)))
    if machine_id is not None:
        q = q.where(Machine.id == machine_id)
    return {m: (ts, float(hz)) for m, ts, hz in s.execute(q)}
