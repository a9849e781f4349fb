"""The plant overview: a page of machines with their stored retained status, filtered and
sorted in the database.

Each machine's summary is the retained status the service built and stored
(``machine_status``, monitor/store/statuses.py) when its readings, speed or alarms last
changed it; nothing is worked out again per request. A page costs three statements
whatever the number of machines: the page itself (``LIMIT``/``OFFSET`` on the filtered,
sorted rows), the number of machines the filters match and the plant's count by state.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from sqlalchemy import ColumnElement, and_, case, func, literal_column, or_, select
from sqlalchemy.orm import Session

from monitor.detection.alarms import LEVELS, severity_rank
from monitor.model.timefmt import iso_utc
from monitor.store.models import Machine, MachineStatus
from monitor.store.reads.evaluations import nearest_margin

#: What a machine's row of the overview says of it.
OVERVIEW_STATES = ("alarm", "normal", "no_data")
ZONES = ("A", "B", "C", "D")
#: The sort keys of the overview; a leading '-' reverses one.
SORT_KEYS = ("name", "location", "state", "speed", "margin", "zone", "alarms", "last_reading")
#: Most machines on one page.
MAX_OVERVIEW_PAGE = 500

_S = MachineStatus
# The state names are SQL text, not parameters: PostgreSQL groups by the expression only
# when the one in GROUP BY is the very same text as the one selected.
#: alarm with an open alarm; no_data before any reading or speed (and with no alarm).
machine_state = case(
    (func.coalesce(_S.active_alarms, 0) > 0, literal_column("'alarm'")),
    (and_(_S.ts.is_(None), _S.speed_at.is_(None)), literal_column("'no_data'")),
    else_=literal_column("'normal'"),
)
#: Worst first: severe, alert, advisory, then normal, then no data.
_STATE_ORDER = case(
    (func.coalesce(_S.active_alarms, 0) > 0, 3 - _S.severity_rank),
    (and_(_S.ts.is_(None), _S.speed_at.is_(None)), 5),
    else_=4,
)
_SORT_COLUMNS: dict[str, Any] = {
    "name": Machine.name, "location": Machine.location, "state": _STATE_ORDER, "speed": _S.speed_hz,
    # The shortfall against the required margin: the tightest machine first.
    "margin": _S.margin_gap_pct, "zone": _S.zone, "alarms": func.coalesce(_S.active_alarms, 0),
    "last_reading": _S.ts,
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


def _where(q: OverviewQuery) -> list[ColumnElement[bool]]:
    conds: list[ColumnElement[bool]] = [Machine.active.is_(True)]
    if q.text:
        needle = q.text.lower()
        conds.append(or_(*(func.lower(c).contains(needle, autoescape=True)
                           for c in (Machine.name, Machine.id, Machine.location))))
    if q.group is not None:
        conds.append(Machine.location == q.group)
    if q.state is not None:
        conds.append(machine_state == q.state)
    if q.severity is not None:
        conds.append(and_(_S.active_alarms > 0, _S.severity_rank == severity_rank(q.severity)))
    if q.zone is not None:
        conds.append(_S.zone == q.zone)
    return conds


def _order(sort: str) -> list[Any]:
    key = sort.removeprefix("-")
    col = _SORT_COLUMNS[key]
    first = col.desc() if sort.startswith("-") else col.asc()
    # A machine without the value comes last either way; then by name and id.
    return [first.nulls_last(), Machine.name, Machine.id]


def _item(r: Any) -> dict[str, Any]:
    nm = r.nearest_margin
    return {
        "id": r.id, "name": r.name or r.id, "location": r.location, "class": r.machine_class,
        "state": r.state,
        "speed_hz": r.speed_hz, "speed_rpm": None if r.speed_hz is None else r.speed_hz * 60.0,
        "speed_at": iso_utc(r.speed_at), "speed_source": r.speed_source,
        "last_reading_at": iso_utc(r.ts),
        "nearest_margin": nearest_margin([nm]) if isinstance(nm, dict) and "mode" in nm else None,
        "worst_zone": None if r.zone is None else {
            "point": r.zone_point, "zone": r.zone, "overall_mm_s_rms": r.overall_mm_s_rms},
        "active_alarms": r.active_alarms or 0,
        "worst_severity": LEVELS[r.severity_rank] if r.active_alarms else None,
    }


def overview_page(s: Session, q: OverviewQuery) -> dict[str, Any]:
    """One page of the overview (three statements): ``items`` (the machines of the page,
    each with its stored status), ``next`` (the offset of the next page, or None),
    ``total`` (machines the filters match) and ``counts`` (active machines by state)."""
    conds = _where(q)
    joined = select(Machine.id).outerjoin(_S, _S.machine_id == Machine.id)
    rows = s.execute(
        select(Machine.id, Machine.name, Machine.location, Machine.machine_class, machine_state.label("state"),
               _S.ts, _S.severity_rank, _S.active_alarms, _S.speed_hz, _S.speed_source, _S.speed_at,
               _S.zone, _S.zone_point, _S.overall_mm_s_rms, _S.nearest_margin)
        .outerjoin(_S, _S.machine_id == Machine.id)
        .where(*conds).order_by(*_order(q.sort)).offset(q.offset).limit(q.limit + 1)).all()
    total = s.execute(joined.with_only_columns(func.count()).where(*conds)).scalar_one()
    counts = dict.fromkeys(OVERVIEW_STATES, 0)
    for state, n in s.execute(joined.with_only_columns(machine_state, func.count())
                              .where(Machine.active.is_(True)).group_by(machine_state)):
        counts[state] = n
    more = len(rows) > q.limit
    return {"items": [_item(r) for r in rows[:q.limit]], "next": q.offset + q.limit if more else None,
            "total": total, "counts": counts}


def machine_groups(s: Session) -> list[str]:
    """The locations of the active machines, for the overview's group filter."""
    return list(s.scalars(select(Machine.location).where(Machine.active.is_(True), Machine.location != "")
                          .distinct().order_by(Machine.location)))

