"""What the service leaves out for planned work and shelving (ISA-18.2 / IEC 62682).

- **Out of service** (monitor/store/out_of_service.py): a batch reads the periods lasting
  at the service's clock for the machines it touches (one statement, :func:`planned_work`);
  a waveform of a point covered goes through
  :meth:`~monitor.detection.evaluator.MachineEvaluator.evaluate_out_of_service` (nothing
  raised, nothing learnt, stored marked ``out_of_service``), a speed message of a machine
  out of service advances no resonance alarm, and neither feeds the passage trackers; the
  stale-stream check skips the points covered. Open alarms stay as they are.
- **Shelving** (monitor/store/shelving.py): :func:`unshelve_expired`, a periodic job,
  records the ``unshelved`` transition of each alarm whose shelving time has passed (the
  alarm counts as unshelved from that instant whoever reads it; the job only writes it down).
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Collection
from dataclasses import dataclass, field

from sqlalchemy.orm import Session

from monitor.service.core import Core
from monitor.store import reads
from monitor.store.shelving import unshelve_due


@dataclass(frozen=True)
class PlannedWork:
    """The equipment out of service at one instant: whole machines, and points by machine."""

    machines: frozenset[str] = frozenset()
    points: dict[str, frozenset[str]] = field(default_factory=dict)

    def covers(self, machine: str, point: str | None) -> bool:
        """Whether a reading of ``machine``/``point`` (None: machine-level, a speed
        message) is out of service."""
        return machine in self.machines or (point is not None and point in self.points.get(machine, ()))

    def points_of(self, machine: str, every: Collection[str]) -> frozenset[str]:
        """The points of ``machine`` out of service, of its points ``every``."""
        return frozenset(every) if machine in self.machines else self.points.get(machine, frozenset())


NONE = PlannedWork()
#: How often the periodic job looks for shelvings whose time has passed, s.
UNSHELVE_S = 5.0


def planned_work(s: Session, machines: Collection[str], now_s: float) -> PlannedWork:
    """The periods out of service of ``machines`` lasting at ``now_s`` (epoch s)."""
    if not machines:
        return NONE
    rows = reads.lasting_out_of_service(s, dt.datetime.fromtimestamp(now_s, dt.UTC), machines)
    if not rows:
        return NONE
    whole = frozenset(r.machine_id for r in rows if r.point_id is None)
    points: dict[str, set[str]] = {}
    for r in rows:
        if r.point_id is not None:
            points.setdefault(r.machine_id, set()).add(r.point_id)
    return PlannedWork(whole, {m: frozenset(p) for m, p in points.items()})


def unshelve_expired(core: Core) -> list[int]:
    """Record the end of every shelving whose time has passed by the service's clock; the
    alarm ids unshelved."""
    now = dt.datetime.fromtimestamp(core.clock(), dt.UTC)
    with core.transaction() as s:
        return unshelve_due(s, now)
