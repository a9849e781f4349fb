"""Live passages: the resonance passages the service finds in run-ups and coast-downs,
and the state of its passage trackers.

- ``passages``: one row per passage of a sweep at one point (kind, times, natural
  frequency, amplification factor, damping ratio, phase, the stored mode it matched and
  its shift, the Bode points), and what an engineer decided on one that matched no mode
  (a candidate mode).
- ``passage_trackers``: per machine, the JSON state of its points' sweep trackers, written
  with the detector state so a restarted service carries on where it stopped.

Revision ID: 0004
Revises: 0003
Create Date: 2026-12-05
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

# Frozen copies of the model types: a migration must not change when models.py does.
UTC_TIME = sa.DateTime(timezone=True)
BIG_ID = sa.BigInteger().with_variant(sa.Integer(), "sqlite")

revision: str = "0004"
down_revision: str | None = "0003"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "passage_trackers",
        sa.Column("machine_id", sa.String(length=64), nullable=False),
        sa.Column("state", sa.JSON(), nullable=False),
        sa.Column("updated_at", UTC_TIME, nullable=False),
        sa.ForeignKeyConstraint(
            ["machine_id"], ["machines.id"],
            name=op.f("fk_passage_trackers_machine_id_machines"), ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("machine_id", name=op.f("pk_passage_trackers")),
    )
    op.create_table(
        "passages",
        sa.Column("id", BIG_ID, nullable=False),
        sa.Column("machine_id", sa.String(length=64), nullable=False),
        sa.Column("point_id", sa.String(length=64), nullable=False),
        sa.Column("seq", sa.Integer(), nullable=False),
        sa.Column("kind", sa.String(length=16), nullable=False),
        sa.Column("method", sa.String(length=16), nullable=False),
        sa.Column("started_at", UTC_TIME, nullable=False),
        sa.Column("ended_at", UTC_TIME, nullable=False),
        sa.Column("detected_at", UTC_TIME, nullable=False),
        sa.Column("natural_frequency_hz", sa.Float(), nullable=False),
        sa.Column("critical_speed_hz", sa.Float(), nullable=False),
        sa.Column("amplification_factor", sa.Float(), nullable=False),
        sa.Column("damping_ratio", sa.Float(), nullable=False),
        sa.Column("peak_amplitude", sa.Float(), nullable=False),
        sa.Column("unit", sa.String(length=16), nullable=False),
        sa.Column("phase_at_peak_deg", sa.Float(), nullable=True),
        sa.Column("phase_change_deg", sa.Float(), nullable=True),
        sa.Column("mode", sa.String(length=200), nullable=True),
        sa.Column("shift_pct", sa.Float(), nullable=True),
        sa.Column("points", sa.JSON(), nullable=False),
        sa.Column("candidate", sa.String(length=16), nullable=True),
        sa.Column("decided_by", sa.String(length=100), nullable=True),
        sa.Column("decided_at", UTC_TIME, nullable=True),
        sa.Column("accepted_mode", sa.String(length=200), nullable=True),
        sa.ForeignKeyConstraint(
            ["machine_id"], ["machines.id"], name=op.f("fk_passages_machine_id_machines")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_passages")),
        sa.UniqueConstraint("machine_id", "point_id", "started_at", "seq",
                            name=op.f("uq_passages_machine_id_point_id_started_at_seq")),
    )
    op.create_index(op.f("ix_passages_machine_id_id"), "passages", ["machine_id", "id"],
                    unique=False)


def downgrade() -> None:
    op.drop_index(op.f("ix_passages_machine_id_id"), table_name="passages")
    op.drop_table("passages")
    op.drop_table("passage_trackers")
