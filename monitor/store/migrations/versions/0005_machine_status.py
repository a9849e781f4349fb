"""The retained status of each machine, stored for the overview.

- ``machine_status``: per machine, the status body the service last published on
  ``{prefix}/{machine}/status`` (docs/mqtt.md), written in the transaction that built
  it, with the parts the overview filters and sorts on as columns (worst severity rank and
  count of the active alarms, running speed, worst zone, nearest margin and its shortfall).

Every active machine has one row: the upgrade writes a blank one (no data yet) for each,
which the service replaces with the first status it builds for the machine (its next
reading, speed message or alarm change). Indexes serve the overview's default orders:
(``state_rank``, ``machine_id``) and machines (``name``, ``id``).

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-04
"""

from __future__ import annotations

import datetime as dt
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
        sa.Column("state_rank", sa.Integer(), nullable=False),
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
    op.create_index(op.f("ix_machine_status_state_rank_machine_id"), "machine_status",
                    ["state_rank", "machine_id"], unique=False)
    op.create_index(op.f("ix_machines_name_id"), "machines", ["name", "id"], unique=False)
    bind = op.get_bind()
    machines = sa.table("machines", sa.column("id", sa.String), sa.column("active", sa.Boolean))
    ids = [i for (i,) in bind.execute(sa.select(machines.c.id).where(machines.c.active.is_(True)))]
    if ids:
        # A frozen copy of monitor/store/statuses.py blank_status: the body of no data yet.
        status = sa.table("machine_status", sa.column("machine_id", sa.String), sa.column("state_rank", sa.Integer),
                          sa.column("active_alarms", sa.Integer), sa.column("status", sa.JSON),
                          sa.column("updated_at", UTC_TIME))
        now = dt.datetime.now(dt.UTC)
        if bind.dialect.name == "sqlite":
            now = now.replace(tzinfo=None)
        bind.execute(status.insert(), [
            {"machine_id": i, "state_rank": 4, "active_alarms": 0, "updated_at": now,
             "status": {"machine": i, "ts": None, "state": "normal", "speed_hz": None, "speed_source": None,
                        "speed_at": None, "nearest_margin": None, "zone": None, "zones": {},
                        "overall_mm_s_rms": {}, "worst_zone": None, "active_alarms": []}}
            for i in ids])


def downgrade() -> None:
    op.drop_index(op.f("ix_machines_name_id"), table_name="machines")
    op.drop_index(op.f("ix_machine_status_state_rank_machine_id"), table_name="machine_status")
    op.drop_table("machine_status")
