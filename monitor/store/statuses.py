"""The retained status of each machine, stored for the overview (table ``machine_status``).

The service builds a machine's status body (monitor/service/payloads.py, docs/mqtt.md)
when a transaction changes what it says, and writes it here in that same transaction:
the overview reads these rows (monitor/store/reads/overview.py) instead of working the
summary out again from the readings, alarms and modes on every request.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from typing import Any, cast

from sqlalchemy import Connection, Table
from sqlalchemy.dialects import postgresql, sqlite
from sqlalchemy.orm import Session

from monitor.detection.alarms import severity_rank
from monitor.model.timefmt import parse_iso_utc
from monitor.store.models import MachineStatus, utcnow

MACHINE_STATUS = cast(Table, MachineStatus.__table__)
#: The columns an upsert replaces (all but the key).
_UPDATED = tuple(c.name for c in MACHINE_STATUS.c if c.name != "machine_id")
_STATEMENTS: dict[str, Any] = {}


def _finite(x: Any) -> float | None:
    return None if x is None or not math.isfinite(float(x)) else float(x)


def status_values(body: Mapping[str, Any]) -> dict[str, Any]:
    """The ``machine_status`` row of a status body: the body itself and the parts the
    overview filters and sorts on."""
    alarms = body.get("active_alarms") or []
    worst = body.get("worst_zone") or {}
    nearest = body.get("nearest_margin")
    gap = None
    if nearest is not None:
        gap = _finite(float(nearest["margin_pct"]) - float(nearest["required_pct"]))
    return {
        "machine_id": body["machine"],
        "ts": parse_iso_utc(body["ts"]) if body.get("ts") else None,
        "severity_rank": max((severity_rank(a["severity"]) for a in alarms), default=0),
        "active_alarms": len(alarms),
        "speed_hz": _finite(body.get("speed_hz")),
        "speed_source": body.get("speed_source"),
        "speed_at": parse_iso_utc(body["speed_at"]) if body.get("speed_at") else None,
        "zone": worst.get("zone"),
        "zone_point": worst.get("point"),
        "overall_mm_s_rms": _finite(worst.get("overall_mm_s_rms")),
        "margin_gap_pct": gap,
        "nearest_margin": nearest,
        "status": dict(body),
        "updated_at": utcnow(),
    }


def save_statuses(db: Session | Connection, bodies: Iterable[Mapping[str, Any]]) -> None:
    """Upsert the status rows of ``bodies`` (one statement, one parameter set per
    machine), inside the caller's transaction."""
    rows = sorted((status_values(b) for b in bodies), key=lambda r: r["machine_id"])
    if not rows:
        return
    dialect = db.dialect.name if isinstance(db, Connection) else db.get_bind().dialect.name
    stmt = _STATEMENTS.get(dialect)
    if stmt is None:
        ins = (postgresql if dialect == "postgresql" else sqlite).insert(MACHINE_STATUS)
        stmt = _STATEMENTS[dialect] = ins.on_conflict_do_update(
            index_elements=["machine_id"], set_={c: ins.excluded[c] for c in _UPDATED})
    db.execute(stmt, rows)

