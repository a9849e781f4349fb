"""Reads of the dashboard's users and API tokens (the checks that sign them in, and
their writes, are in monitor/store/auth.py)."""

from __future__ import annotations

from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from monitor.store.models import ApiToken, User


def user_by_id(s: Session, uid: int) -> User | None:
    """The user with this id, or None when there is none or it is disabled."""
    u = s.get(User, uid)
    return None if u is None or u.disabled else u


def list_tokens(s: Session) -> list[dict[str, Any]]:
    """Every API token (never its text or digest), newest first, with its user's name."""
    rows = s.execute(select(ApiToken, User.name).join(User).order_by(ApiToken.id.desc())).all()
    return [
        {"id": t.id, "username": n, "label": t.label, "created_at": t.created_at,
         "last_used_at": t.last_used_at, "revoked_at": t.revoked_at}
        for t, n in rows
    ]
