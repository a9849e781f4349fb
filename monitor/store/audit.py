"""The audit trail of users, passwords, roles, tokens, sign-ins and sign-outs, and of the
engineers' alarm-management actions: shelving an alarm and ending it, putting equipment
out of service and returning it (monitor/store/shelving.py, monitor/store/out_of_service.py).

Every change is one row of ``audit_events``: who (``actor``), what (``action`` and
``detail``), to whom (``target``), when (``at``, UTC) and from where (``address``: the
client address, or ``local`` for the command line). :mod:`monitor.store.auth` writes
them in the same transaction as the change, so a change is never stored without its row.
"""

from __future__ import annotations

import getpass
from dataclasses import dataclass
from typing import Any

from sqlalchemy.orm import Session

from monitor.store.models import AuditEvent

#: Every action recorded, in the order a user's life goes.
ACTIONS = (
    "user_create", "sign_in", "sign_out", "password_change", "password_reset", "role_change",
    "user_disable", "user_enable", "user_delete", "token_create", "token_revoke",
    "alarm_shelve", "alarm_unshelve", "out_of_service", "return_to_service",
)


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
