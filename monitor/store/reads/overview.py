"""The plant overview: a page of machines with their stored retained status, filtered and
sorted in the database.

Each machine's summary is the retained status the service built and stored
(``machine_status``, monitor/store/statuses.py) when its readings, speed or alarms last
changed it; nothing is worked out again per request. Every active machine has one status
row, so a page is two statements whatever the number of machines (three with a filter):
the page itself (``LIMIT``/``OFFSET`` on the filtered, sorted rows), the plant's count by
state from the status table's index, and with filters the number they match. The default
order (worst first, then machine id) and the order by name are read in index order
and stop at the page; the other orders and the text, group and zone filters go through
the machines.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from sqlalchemy import ColumnElement, func, or_, select
from sqlalchemy.orm import Session

from monitor.detection.alarms import LEVELS, severity_rank
from monitor.model.timefmt import iso_utc
from monitor.store.machine_stops import stop_in_force
from monitor.store.models import Machine, MachineStatus, utcnow
from monitor.store.reads.evaluations import nearest_margin
from monitor.store.statuses import NO_DATA_RANK, NORMAL_RANK

#: What a machine's row of the overview says of it.
OVERVIEW_STATES = ("alarm", "normal", "no_data")
ZONES = ("A", "B", "C", "D")
#: The sort keys of the overview; a leading '-' reverses one.
SORT_KEYS = ("name", "location", "state", "speed", "margin", "zone", "alarms", "last_reading")
#: Most machines on one page.
MAX_OVERVIEW_PAGE = 500

_S = MachineStatus
_SORT_COLUMNS: dict[str, Any] = {
    "name": Machine.name, "location": Machine.location, "state": _S.state_rank, "speed": _S.speed_hz,
    # The shortfall against the required margin: the tightest machine first.
    "margin": _S.margin_gap_pct, "zone": _S.zone, "alarms": _S.active_alarms, "last_reading": _S.ts,
}


@dataclass(frozen=True)
class OverviewQuery:
    """Filters, sort and page of the overview. ``text``: part of a machine's name, id or
    location (any case); ``group``: its location exactly; ``state``: one of
    :data:`OVERVIEW_STATES`; ``severity``: the worst severity of its open alarms;
    ``zone``: its worst ISO 20816 zone; ``sort``: a :data:`SORT_KEYS` key, '-' first to
    reverse; ``offset``: machines to skip; ``limit``: machines on the page."""

    text: str | None = None
    group: str | None = None
    state: str | None = None
    severity: str | None = None
    zone: str | None = None
    sort: str = "state"
    offset: int = 0
    limit: int = 50

    @property
    def filtered(self) -> bool:
        return any(v is not None for v in (self.text, self.group, self.state, self.severity, self.zone))


def _where(q: OverviewQuery) -> list[ColumnElement[bool]]:
    conds: list[ColumnElement[bool]] = [Machine.active.is_(True)]
    if q.text:
        needle = q.text.lower()
        conds.append(or_(*(func.lower(c).contains(needle, autoescape=True)
                           for c in (Machine.name, Machine.id, Machine.location))))
    if q.group is not None:
        conds.append(Machine.location == q.group)
    if q.state == "alarm":
        conds.append(_S.state_rank < NORMAL_RANK)
    elif q.state is not None:
        conds.append(_S.state_rank == (NORMAL_RANK if q.state == "normal" else NO_DATA_RANK))
    if q.severity is not None:
        conds.append(_S.state_rank == NORMAL_RANK - severity_rank(q.severity))
    if q.zone is not None:
        conds.append(_S.zone == q.zone)
    return conds


def _order(sort: str) -> list[Any]:
    key = sort.removeprefix("-")
    col = _SORT_COLUMNS[key]
    first = col.desc() if sort.startswith("-") else col.asc()
    if key == "name":
        return [first, Machine.id.desc() if sort.startswith("-") else Machine.id]
    # A machine without the value comes last either way; ties by machine id.
    return [first if key == "state" else first.nulls_last(), _S.machine_id]


def _state(rank: int) -> str:
    return "alarm" if rank < NORMAL_RANK else ("normal" if rank == NORMAL_RANK else "no_data")


def _item(r: Any) -> dict[str, Any]:
    nm = r.nearest_margin
    return {
        "id": r.id, "name": r.name or r.id, "location": r.location, "class": r.machine_class,
        "state": _state(r.state_rank),
        "speed_hz": r.speed_hz, "speed_rpm": None if r.speed_hz is None else r.speed_hz * 60.0,
        "speed_at": iso_utc(r.speed_at), "speed_source": r.speed_source,
        "last_reading_at": iso_utc(r.ts),
        "nearest_margin": nearest_margin([nm]) if isinstance(nm, dict) and "mode" in nm else None,
        "worst_zone": None if r.zone is None else {
            "point": r.zone_point, "zone": r.zone, "overall_mm_s_rms": r.overall_mm_s_rms},
        "active_alarms": r.active_alarms,
        # The service's latest judgement; stopped while an announced stop is in force.
        "running": "stopped" if r.stop_announced else r.running, "stop_announced": bool(r.stop_announced),
        "worst_severity": LEVELS[NORMAL_RANK - r.state_rank] if r.state_rank < NORMAL_RANK else None,
    }


def overview_page(s: Session, q: OverviewQuery) -> dict[str, Any]:
    """One page of the overview: ``items`` (the machines of the page, each with its
    stored status), ``next`` (the offset of the next page, or None), ``total`` (machines
    the filters match) and ``counts`` (active machines by state)."""
    conds = _where(q)
    rows = s.execute(
        select(Machine.id, Machine.name, Machine.location, Machine.machine_class,
               _S.ts, _S.state_rank, _S.active_alarms, _S.speed_hz, _S.speed_source, _S.speed_at,
               _S.zone, _S.zone_point, _S.overall_mm_s_rms, _S.nearest_margin, _S.running,
               stop_in_force(Machine.id, utcnow()).label("stop_announced"))
        .select_from(_S).join(Machine, Machine.id == _S.machine_id)
        .where(*conds).order_by(*_order(q.sort)).offset(q.offset).limit(q.limit + 1)).all()
    # Every active machine has one status row (and only they): counted from its index.
    counts = dict.fromkeys(OVERVIEW_STATES, 0)
    for rank, n in s.execute(select(_S.state_rank, func.count()).group_by(_S.state_rank)):
        counts[_state(rank)] += n
    total = sum(counts.values())
    if q.filtered:
        total = s.execute(select(func.count()).select_from(_S).join(Machine, Machine.id == _S.machine_id)
                          .where(*conds)).scalar_one()
    more = len(rows) > q.limit
    return {"items": [_item(r) for r in rows[:q.limit]], "next": q.offset + q.limit if more else None,
            "total": total, "counts": counts}


def machine_groups(s: Session) -> list[str]:
    """The locations of the active machines, for the overview's group filter."""
    return list(s.scalars(select(Machine.location).where(Machine.active.is_(True), Machine.location != "")
                          .distinct().order_by(Machine.location)))
