"""The audit trail of users, passwords, roles, tokens, sign-ins and sign-outs.

Every change is one row of ``audit_events``: who (``actor``), what (``action`` and
``detail``), to whom (``target``), when (``at``, UTC) and from where (``address``: the
client address, or ``local`` for the command line). :mod:`monitor.store.auth` writes
them in the same transaction as the change, so a change is never stored without its row.
"""

from __future__ import annotations

import getpass
from dataclasses import dataclass
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from monitor.model.timefmt import iso_utc
from monitor.store.models import AuditEvent

#: Every action recorded, in the order a user's life goes.
ACTIONS = (
    "user_create", "sign_in", "sign_out", "password_change", "password_reset", "role_change",
    "user_disable", "user_enable", "user_delete", "token_create", "token_revoke",
)
MAX_PAGE = 500


@dataclass(frozen=True)
class Actor:
    """Who makes a change, and from where (a client address, or ``local``)."""

    name: str
    address: str


def local_actor() -> Actor:
    """The person at this machine's command line (their operating-system login name)."""
    try:
        who = getpass.getuser()
    except (OSError, KeyError):  # no login name in the environment or the password database
        who = "unknown"
    return Actor(f"local:{who}"[:100], "local")


def record(session: Session, by: Actor, action: str, target: str,
           detail: dict[str, Any] | None = None) -> AuditEvent:
    """Add one audit row (inside the caller's transaction)."""
    if action not in ACTIONS:
        raise ValueError(f"audit action {action!r} must be one of {', '.join(ACTIONS)}.")
    row = AuditEvent(actor=by.name[:100], action=action, target=target[:100],
                     detail=detail or {}, address=by.address[:64])
    session.add(row)
    return row


def find_events(session: Session, *, user: str | None = None, action: str | None = None,
                before_id: int | None = None, limit: int = 50) -> tuple[list[AuditEvent], int | None]:
    """Audit rows, newest first, optionally about (or by) ``user`` and of one ``action``;
    returns the page and the cursor of the next (None on the last page)."""
    if not 1 <= limit <= MAX_PAGE:
        raise ValueError(f"limit must be 1-{MAX_PAGE}, got {limit}.")
    q = select(AuditEvent).order_by(AuditEvent.id.desc()).limit(limit + 1)
    if user:
        q = q.where((AuditEvent.target == user) | (AuditEvent.actor == user))
    if action:
        q = q.where(AuditEvent.action == action)
    if before_id is not None:
        q = q.where(AuditEvent.id < before_id)
    rows = list(session.scalars(q))
    more = len(rows) > limit
    rows = rows[:limit]
    return rows, (rows[-1].id if more and rows else None)


def event_json(e: AuditEvent) -> dict[str, Any]:
    """The API's shape of one audit row (docs/api.md, "Audit")."""
    return {"id": e.id, "at": iso_utc(e.at), "actor": e.actor, "action": e.action,
            "target": e.target, "detail": e.detail, "address": e.address}
