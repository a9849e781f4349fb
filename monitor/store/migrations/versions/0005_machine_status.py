"""The retained status of each machine, stored for the overview.

- ``machine_status``: per machine, the status body the service last published on
  ``{prefix}/{machine}/status`` (docs/mqtt.md), written in the transaction that built
  it, with the parts the overview filters and sorts on as columns (worst severity rank and
  count of the active alarms, running speed, worst zone, nearest margin and its shortfall).

A database upgraded to this revision has no rows yet: each machine's row appears with the
first status the service builds for it (its next reading, speed message or alarm change).

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-04
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

# Frozen copies of the model types: a migration must not change when models.py does.
UTC_TIME = sa.DateTime(timezone=True)

revision: str = "0005"
down_revision: str | None = "0004"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "machine_status",
        sa.Column("machine_id", sa.String(length=64), nullable=False),
        sa.Column("ts", UTC_TIME, nullable=True),
        sa.Column("severity_rank", sa.Integer(), nullable=False),
        sa.Column("active_alarms", sa.Integer(), nullable=False),
        sa.Column("speed_hz", sa.Float(), nullable=True),
        sa.Column("speed_source", sa.String(length=16), nullable=True),
        sa.Column("speed_at", UTC_TIME, nullable=True),
        sa.Column("zone", sa.String(length=8), nullable=True),
        sa.Column("zone_point", sa.String(length=64), nullable=True),
        sa.Column("overall_mm_s_rms", sa.Float(), nullable=True),
        sa.Column("margin_gap_pct", sa.Float(), nullable=True),
        sa.Column("nearest_margin", sa.JSON(), nullable=True),
        sa.Column("status", sa.JSON(), nullable=False),
        sa.Column("updated_at", UTC_TIME, nullable=False),
        sa.ForeignKeyConstraint(
            ["machine_id"], ["machines.id"],
            name=op.f("fk_machine_status_machine_id_machines"), ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("machine_id", name=op.f("pk_machine_status")),
    )


def downgrade() -> None:
    op.drop_table("machine_status")
