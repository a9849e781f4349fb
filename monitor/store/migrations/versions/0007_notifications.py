"""Notification deliveries: ``notification_deliveries``, one row per delivery attempt of
an alarm transition to a webhook or by e-mail (target, destination, attempt number,
outcome, what the target answered).

Revision ID: 0007
Revises: 0006
Create Date: 2026-12-04
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

# Frozen copies of the model types: a migration must not change when models.py does.
UTC_TIME = sa.DateTime(timezone=True)
BIG_ID = sa.BigInteger().with_variant(sa.Integer(), "sqlite")

revision: str = "0007"
down_revision: str | None = "0006"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "notification_deliveries",
        sa.Column("id", BIG_ID, nullable=False),
        sa.Column("alarm_id", BIG_ID, nullable=False),
        sa.Column("transition", sa.String(length=32), nullable=False),
        sa.Column("transition_at", UTC_TIME, nullable=False),
        sa.Column("target", sa.String(length=16), nullable=False),
        sa.Column("destination", sa.String(length=500), nullable=False),
        sa.Column("attempt", sa.Integer(), nullable=False),
        sa.Column("outcome", sa.String(length=16), nullable=False),
        sa.Column("detail", sa.Text(), nullable=False),
        sa.Column("at", UTC_TIME, nullable=False),
        sa.ForeignKeyConstraint(
            ["alarm_id"], ["alarms.id"], name=op.f("fk_notification_deliveries_alarm_id_alarms")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_notification_deliveries")),
    )
    op.create_index(
        op.f("ix_notification_deliveries_alarm_id_id"),
        "notification_deliveries",
        ["alarm_id", "id"],
        unique=False,
    )


def downgrade() -> None:
    op.drop_index(op.f("ix_notification_deliveries_alarm_id_id"), table_name="notification_deliveries")
    op.drop_table("notification_deliveries")
