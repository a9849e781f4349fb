"""Server-side session version per user, known sign-in addresses, and the audit table.

- ``users.session_version``: stored in each dashboard session; moved on by sign-out,
  password change or reset, role change and disabling, which ends every session of the
  user.
- ``users.known_addresses``: client addresses of the user's last successful sign-ins; a
  sign-in from one of them is not held back by the per-account login limit.
- ``audit_events``: who changed which user, password, role or token, and each sign-in
  and sign-out, when and from where.

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-04
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

# Frozen copies of the model types: a migration must not change when models.py does.
UTC_TIME = sa.DateTime(timezone=True)
BIG_ID = sa.BigInteger().with_variant(sa.Integer(), "sqlite")

revision: str = "0003"
down_revision: str | None = "0002"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    with op.batch_alter_table("users") as batch:
        batch.add_column(sa.Column("session_version", sa.Integer(), nullable=False,
                                   server_default="0"))
        batch.add_column(sa.Column("known_addresses", sa.JSON(), nullable=False,
                                   server_default="[]"))
    op.create_table(
        "audit_events",
        sa.Column("id", BIG_ID, nullable=False),
        sa.Column("at", UTC_TIME, nullable=False),
        sa.Column("actor", sa.String(length=100), nullable=False),
        sa.Column("action", sa.String(length=32), nullable=False),
        sa.Column("target", sa.String(length=100), nullable=False),
        sa.Column("detail", sa.JSON(), nullable=False),
        sa.Column("address", sa.String(length=64), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_audit_events")),
    )
    op.create_index(op.f("ix_audit_events_at"), "audit_events", ["at"], unique=False)
    op.create_index(op.f("ix_audit_events_target_at"), "audit_events", ["target", "at"],
                    unique=False)


def downgrade() -> None:
    op.drop_index(op.f("ix_audit_events_target_at"), table_name="audit_events")
    op.drop_index(op.f("ix_audit_events_at"), table_name="audit_events")
    op.drop_table("audit_events")
    with op.batch_alter_table("users") as batch:
        batch.drop_column("known_addresses")
        batch.drop_column("session_version")
