"""Announced stops: ``machine_stops``, one row per stop an engineer announced for planned
work (from, until, why, who; when ended early and by whom); ``machine_status.running``,
the machine running or stopped as its retained status says (the overview shows it).

Revision ID: 0009
Revises: 0008
Create Date: 2026-12-04
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

# Frozen copies of the model types: a migration must not change when the models do.
UTC_TIME = sa.DateTime(timezone=True)
BIG_ID = sa.BigInteger().with_variant(sa.Integer(), "sqlite")

revision: str = "0009"
down_revision: str | None = "0008"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "machine_stops",
        sa.Column("id", BIG_ID, nullable=False),
        sa.Column("machine_id", sa.String(length=64), nullable=False),
        sa.Column("starts_at", UTC_TIME, nullable=False),
        sa.Column("ends_at", UTC_TIME, nullable=False),
        sa.Column("comment", sa.Text(), nullable=False),
        sa.Column("announced_by", sa.String(length=100), nullable=False),
        sa.Column("announced_at", UTC_TIME, nullable=False),
        sa.Column("ended_at", UTC_TIME, nullable=True),
        sa.Column("ended_by", sa.String(length=100), nullable=True),
        sa.ForeignKeyConstraint(["machine_id"], ["machines.id"], ondelete="CASCADE",
                                name=op.f("fk_machine_stops_machine_id_machines")),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_machine_stops")),
    )
    op.create_index(op.f("ix_machine_stops_machine_id_ends_at"), "machine_stops", ["machine_id", "ends_at"],
                    unique=False)
    with op.batch_alter_table("machine_status") as batch:
        batch.add_column(sa.Column("running", sa.String(length=16), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("machine_status") as batch:
        batch.drop_column("running")
    op.drop_index(op.f("ix_machine_stops_machine_id_ends_at"), table_name="machine_stops")
    op.drop_table("machine_stops")
