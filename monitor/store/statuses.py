"""The retained status of each active machine, stored for the overview (table
``machine_status``).

The service builds a machine's status body (monitor/service/payloads.py, docs/mqtt.md)
when a transaction changes what it says, and writes it here in that same transaction:
the overview reads these rows (monitor/store/reads/overview.py) instead of working the
summary out again from the readings, alarms and modes on every request.

Every active machine has exactly one row: the registry import writes a blank one (no data
yet) for each machine it makes active and removes those of the machines it retires, as the
service does when it retires one (monitor/service/registry_changes.py). So the overview
counts machines by state from this table alone.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from typing import Any, cast

from sqlalchemy import Connection, Table, delete
from sqlalchemy.dialects import postgresql, sqlite
from sqlalchemy.orm import Session

from monitor.detection.alarms import severity_rank
from monitor.model.timefmt import parse_iso_utc
from monitor.store.models import MachineStatus, utcnow

MACHINE_STATUS = cast(Table, MachineStatus.__table__)
#: The columns an upsert replaces (all but the key).
_UPDATED = tuple(c.name for c in MACHINE_STATUS.c if c.name != "machine_id")
#: ``state_rank`` of a machine with no open alarm, and of one with no data yet (below
#: them, 0-2: the worst open alarm is severe, alert or advisory).
NORMAL_RANK = 3
NO_DATA_RANK = 4
_STATEMENTS: dict[tuple[str, bool], Any] = {}

Db = Session | Connection


def _finite(x: Any) -> float | None:
    return None if x is None or not math.isfinite(float(x)) else float(x)


def state_rank(body: Mapping[str, Any]) -> int:
    """0 severe, 1 alert, 2 advisory (the worst severity of the active alarms), 3 normal,
    4 no data yet (neither a reading nor a speed)."""
    alarms = body.get("active_alarms") or []
    if alarms:
        return NORMAL_RANK - max(severity_rank(a["severity"]) for a in alarms)
    return NO_DATA_RANK if body.get("ts") is None and body.get("speed_at") is None else NORMAL_RANK


def blank_status(machine: str) -> dict[str, Any]:
    """The status body of a machine the service has not reported on yet
    (docs/schemas/status.json)."""
    return {"machine": machine, "ts": None, "state": "normal", "speed_hz": None, "speed_source": None,
            "speed_at": None, "nearest_margin": None, "zone": None, "zones": {}, "overall_mm_s_rms": {},
            "worst_zone": None, "running": None, "active_alarms": []}


def status_values(body: Mapping[str, Any]) -> dict[str, Any]:
    """The ``machine_status`` row of a status body: the body itself and the parts the
    overview filters and sorts on."""
    worst = body.get("worst_zone") or {}
    nearest = body.get("nearest_margin")
    gap = None
    if nearest is not None:
        gap = _finite(float(nearest["margin_pct"]) - float(nearest["required_pct"]))
    return {
        "machine_id": body["machine"],
        "ts": parse_iso_utc(body["ts"]) if body.get("ts") else None,
        "state_rank": state_rank(body),
        "active_alarms": len(body.get("active_alarms") or []),
        "speed_hz": _finite(body.get("speed_hz")),
        "speed_source": body.get("speed_source"),
        "speed_at": parse_iso_utc(body["speed_at"]) if body.get("speed_at") else None,
        "zone": worst.get("zone"),
        "zone_point": worst.get("point"),
        "overall_mm_s_rms": _finite(worst.get("overall_mm_s_rms")),
        "margin_gap_pct": gap,
        "running": (body.get("running") or {}).get("state"),
        "nearest_margin": nearest,
        "status": dict(body),
        "updated_at": utcnow(),
    }


def _upsert(db: Db, rows: list[dict[str, Any]], *, replace: bool) -> None:
    if not rows:
        return
    dialect = db.dialect.name if isinstance(db, Connection) else db.get_bind().dialect.name
    stmt = _STATEMENTS.get((dialect, replace))
    if stmt is None:
        ins = (postgresql if dialect == "postgresql" else sqlite).insert(MACHINE_STATUS)
        stmt = _STATEMENTS[(dialect, replace)] = (
            ins.on_conflict_do_update(index_elements=["machine_id"], set_={c: ins.excluded[c] for c in _UPDATED})
            if replace else ins.on_conflict_do_nothing(index_elements=["machine_id"]))
    db.execute(stmt, sorted(rows, key=lambda r: r["machine_id"]))


def save_statuses(db: Db, bodies: Iterable[Mapping[str, Any]]) -> None:
    """Upsert the status rows of ``bodies`` (one statement, one parameter set per
    machine), inside the caller's transaction."""
    _upsert(db, [status_values(b) for b in bodies], replace=True)


def ensure_statuses(db: Db, machines: Iterable[str]) -> None:
    """A blank status row for each of ``machines`` that has none (one statement)."""
    _upsert(db, [status_values(blank_status(m)) for m in machines], replace=False)


def drop_statuses(db: Db, machines: Iterable[str]) -> None:
    """Remove the status rows of retired ``machines``."""
    ids = sorted(machines)
    if ids:
        db.execute(delete(MACHINE_STATUS).where(MACHINE_STATUS.c.machine_id.in_(ids)))
