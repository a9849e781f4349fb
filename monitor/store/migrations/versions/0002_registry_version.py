"""Registry version and baseline restarts: live registry edits and restarts after maintenance.

- ``registry_state``: one row holding the registry version, moved on by every registry
  write; a running service compares it once per batch.
- ``machines.registry_version``: the version of the last write touching the machine.
- ``machines.file_digest``: the machine's entry as last imported from a registry file.
- ``baseline_restarts``: engineers' requests to learn baselines again, and when the
  service applied them.

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-04
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

# Frozen copies of the model types: a migration must not change when models.py does.
UTC_TIME = sa.DateTime(timezone=True)
BIG_ID = sa.BigInteger().with_variant(sa.Integer(), "sqlite")

revision: str = "0002"
down_revision: str | None = "0001"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    registry_state = op.create_table(
        "registry_state",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("version", sa.BigInteger(), nullable=False),
        sa.Column("updated_at", UTC_TIME, nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_registry_state")),
    )
    # SQLite stores naive UTC (models.UTCDateTime), PostgreSQL timestamptz.
    now = dt.datetime.now(dt.UTC)
    if op.get_bind().dialect.name == "sqlite":
        now = now.replace(tzinfo=None)
    op.bulk_insert(registry_state, [{"id": 1, "version": 0, "updated_at": now}])
    with op.batch_alter_table("machines") as batch:
        batch.add_column(sa.Column("registry_version", sa.BigInteger(), nullable=False,
                                   server_default="0"))
        batch.add_column(sa.Column("file_digest", sa.String(length=64), nullable=True))
    op.create_table(
        "baseline_restarts",
        sa.Column("id", BIG_ID, nullable=False),
        sa.Column("machine_id", sa.String(length=64), nullable=False),
        sa.Column("point_id", sa.String(length=64), nullable=True),
        sa.Column("comment", sa.Text(), nullable=False),
        sa.Column("requested_by", sa.String(length=100), nullable=False),
        sa.Column("requested_at", UTC_TIME, nullable=False),
        sa.Column("applied_at", UTC_TIME, nullable=True),
        sa.ForeignKeyConstraint(
            ["machine_id"], ["machines.id"], name=op.f("fk_baseline_restarts_machine_id_machines")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_baseline_restarts")),
    )
    op.create_index(
        op.f("ix_baseline_restarts_machine_id_requested_at"),
        "baseline_restarts",
        ["machine_id", "requested_at"],
        unique=False,
    )


def downgrade() -> None:
    op.drop_index(op.f("ix_baseline_restarts_machine_id_requested_at"), table_name="baseline_restarts")
    op.drop_table("baseline_restarts")
    with op.batch_alter_table("machines") as batch:
        batch.drop_column("file_digest")
        batch.drop_column("registry_version")
    op.drop_table("registry_state")
