"""Reads of the dashboard's people: users, API tokens and the audit trail (their writes,
and the checks that sign people in, are in monitor/store/auth.py and monitor/store/audit.py)."""

from __future__ import annotations

from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from monitor.model.timefmt import iso_utc
from monitor.store.models import ApiToken, AuditEvent, User

#: Most audit rows on one page.
MAX_AUDIT_PAGE = 500


def get_user(session: Session, name: str) -> User | None:
    """The user called ``name``, or None."""
    return session.execute(select(User).where(User.name == name)).scalar_one_or_none()


def active_user(session: Session, user_id: int) -> User | None:
    """The user with id ``user_id`` unless unknown or disabled."""
    user = session.get(User, user_id)
    return None if user is None or user.disabled else user


def list_api_tokens(session: Session) -> list[dict[str, Any]]:
    """Every API token, newest first, with its user's name (never its text or digest)."""
    rows = session.execute(select(ApiToken, User.name).join(User).order_by(ApiToken.id.desc())).all()
    return [
        {"id": t.id, "username": n, "label": t.label, "created_at": t.created_at,
         "last_used_at": t.last_used_at, "revoked_at": t.revoked_at}
        for t, n in rows
    ]


def find_audit_events(session: Session, *, user: str | None = None, action: str | None = None,
                before_id: int | None = None, limit: int = 50) -> tuple[list[AuditEvent], int | None]:
    """Audit rows, newest first, optionally about (or by) ``user`` and of one ``action``;
    returns the page and the cursor of the next (None on the last page)."""
    if not 1 <= limit <= MAX_AUDIT_PAGE:
        raise ValueError(f"limit must be 1-{MAX_AUDIT_PAGE}, got {limit}.")
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


def audit_event_json(e: AuditEvent) -> dict[str, Any]:
    """The API's shape of one audit row (docs/api.md, "Audit")."""
    return {"id": e.id, "at": iso_utc(e.at), "actor": e.actor, "action": e.action,
            "target": e.target, "detail": e.detail, "address": e.address}
