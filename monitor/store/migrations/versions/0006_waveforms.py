"""Raw time waveforms: ``waveform_snapshots``, one row per kept waveform of a point
(time, sample rate, unit, the running speed its analysis used, the samples as zlib of
little-endian float32, whether it is alarm evidence).

Revision ID: 0006
Revises: 0005
Create Date: 2026-12-04
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

# Frozen copies of the model types: a migration must not change when models.py does.
UTC_TIME = sa.DateTime(timezone=True)
BIG_ID = sa.BigInteger().with_variant(sa.Integer(), "sqlite")

revision: str = "0006"
down_revision: str | None = "0005"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "waveform_snapshots",
        sa.Column("id", BIG_ID, nullable=False),
        sa.Column("machine_id", sa.String(length=64), nullable=False),
        sa.Column("point_id", sa.String(length=64), nullable=False),
        sa.Column("ts", UTC_TIME, nullable=False),
        sa.Column("fs_hz", sa.Float(), nullable=False),
        sa.Column("unit", sa.String(length=16), nullable=False),
        sa.Column("speed_hz", sa.Float(), nullable=True),
        sa.Column("n_samples", sa.Integer(), nullable=False),
        sa.Column("samples", sa.LargeBinary(), nullable=False),
        sa.Column("evidence", sa.Boolean(), nullable=False),
        sa.ForeignKeyConstraint(
            ["machine_id", "point_id"],
            ["measurement_points.machine_id", "measurement_points.id"],
            name=op.f("fk_waveform_snapshots_machine_id_point_id_measurement_points"),
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_waveform_snapshots")),
        sa.UniqueConstraint(
            "machine_id", "point_id", "ts", name=op.f("uq_waveform_snapshots_machine_id_point_id_ts")
        ),
    )
    op.create_index(op.f("ix_waveform_snapshots_ts"), "waveform_snapshots", ["ts"], unique=False)


def downgrade() -> None:
    op.drop_index(op.f("ix_waveform_snapshots_ts"), table_name="waveform_snapshots")
    op.drop_table("waveform_snapshots")
