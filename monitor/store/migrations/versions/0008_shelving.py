"""Shelving and out of service (ISA-18.2 / IEC 62682): each alarm's shelving
(``shelved_until``, ``shelved_by``, ``shelve_comment``), a ``shelved`` flag on each
alarm transition recorded while its alarm was shelved, and ``out_of_service``, one row
per period of planned work on a machine or a point.

Revision ID: 0008
Revises: 0007
Create Date: 2026-12-04
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

# Frozen copies of the model types: a migration must not change when models.py does.
UTC_TIME = sa.DateTime(timezone=True)
BIG_ID = sa.BigInteger().with_variant(sa.Integer(), "sqlite")

revision: str = "0008"
down_revision: str | None = "0007"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    with op.batch_alter_table("alarms") as b:
        b.add_column(sa.Column("shelved_until", UTC_TIME, nullable=True))
        b.add_column(sa.Column("shelved_by", sa.String(length=100), nullable=True))
        b.add_column(sa.Column("shelve_comment", sa.Text(), nullable=True))
    with op.batch_alter_table("alarm_transitions") as b:
        b.add_column(sa.Column("shelved", sa.Boolean(), nullable=False, server_default=sa.false()))
    op.create_table(
        "out_of_service",
        sa.Column("id", BIG_ID, nullable=False),
        sa.Column("machine_id", sa.String(length=64), nullable=False),
        sa.Column("point_id", sa.String(length=64), nullable=True),
        sa.Column("since", UTC_TIME, nullable=False),
        sa.Column("until", UTC_TIME, nullable=True),
        sa.Column("put_by", sa.String(length=100), nullable=False),
        sa.Column("comment", sa.Text(), nullable=False),
        sa.Column("ended_at", UTC_TIME, nullable=True),
        sa.Column("ended_by", sa.String(length=100), nullable=True),
        sa.ForeignKeyConstraint(["machine_id"], ["machines.id"],
                                name=op.f("fk_out_of_service_machine_id_machines")),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_out_of_service")),
    )
    op.create_index(op.f("ix_out_of_service_ended_at_machine_id"), "out_of_service", ["ended_at", "machine_id"],
                    unique=False)


def downgrade() -> None:
    op.drop_index(op.f("ix_out_of_service_ended_at_machine_id"), table_name="out_of_service")
    op.drop_table("out_of_service")
    with op.batch_alter_table("alarm_transitions") as b:
        b.drop_column("shelved")
    with op.batch_alter_table("alarms") as b:
        b.drop_column("shelve_comment")
        b.drop_column("shelved_by")
        b.drop_column("shelved_until")
