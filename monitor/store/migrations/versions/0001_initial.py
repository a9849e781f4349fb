"""Initial schema: registry, measurements, spectra, alarms, users, service tables.

Revision ID: 0001
Revises:
Create Date: 2026-12-02
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

# Frozen copies of the model types: a migration must not change when models.py does.
UTC_TIME = sa.DateTime(timezone=True)
BIG_ID = sa.BigInteger().with_variant(sa.Integer(), "sqlite")

revision: str = "0001"
down_revision: str | None = None
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "dead_letters",
        sa.Column("id", BIG_ID, nullable=False),
        sa.Column("at", UTC_TIME, nullable=False),
        sa.Column("topic", sa.String(length=512), nullable=False),
        sa.Column("reason", sa.String(length=64), nullable=False),
        sa.Column("detail", sa.Text(), nullable=False),
        sa.Column("payload_head", sa.LargeBinary(), nullable=False),
        sa.Column("payload_size", sa.Integer(), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_dead_letters")),
    )
    op.create_index(op.f("ix_dead_letters_at"), "dead_letters", ["at"], unique=False)
    op.create_index(op.f("ix_dead_letters_reason"), "dead_letters", ["reason"], unique=False)

    op.create_table(
        "machines",
        sa.Column("id", sa.String(length=64), nullable=False),
        sa.Column("name", sa.String(length=200), nullable=False),
        sa.Column("location", sa.String(length=200), nullable=False),
        sa.Column("machine_class", sa.String(length=32), nullable=False),
        sa.Column("speed_min_rpm", sa.Float(), nullable=False),
        sa.Column("speed_max_rpm", sa.Float(), nullable=False),
        sa.Column("excitation_orders", sa.JSON(), nullable=False),
        sa.Column("line_frequency_hz", sa.Float(), nullable=True),
        sa.Column("limits_mm_s", sa.JSON(), nullable=True),
        sa.Column("settings", sa.JSON(), nullable=False),
        sa.Column("active", sa.Boolean(), nullable=False),
        sa.Column("position", sa.Integer(), nullable=False),
        sa.Column("created_at", UTC_TIME, nullable=False),
        sa.Column("updated_at", UTC_TIME, nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_machines")),
    )
    op.create_table(
        "users",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(length=100), nullable=False),
        sa.Column("password_hash", sa.String(length=256), nullable=False),
        sa.Column("role", sa.String(length=16), nullable=False),
        sa.Column("created_at", UTC_TIME, nullable=False),
        sa.Column("disabled", sa.Boolean(), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_users")),
        sa.UniqueConstraint("name", name=op.f("uq_users_name")),
    )
    op.create_table(
        "alarms",
        sa.Column("id", BIG_ID, nullable=False),
        sa.Column("ref", sa.String(length=64), nullable=True),
        sa.Column("machine_id", sa.String(length=64), nullable=False),
        sa.Column("point_id", sa.String(length=64), nullable=True),
        sa.Column("kind", sa.String(length=32), nullable=False),
        sa.Column("subject", sa.String(length=200), nullable=False),
        sa.Column("severity", sa.String(length=16), nullable=False),
        sa.Column("state", sa.String(length=16), nullable=False),
        sa.Column("raised_at", UTC_TIME, nullable=False),
        sa.Column("cleared_at", UTC_TIME, nullable=True),
        sa.Column("acknowledged_by", sa.String(length=100), nullable=True),
        sa.Column("acknowledged_at", UTC_TIME, nullable=True),
        sa.Column("ack_comment", sa.Text(), nullable=True),
        sa.Column("evidence", sa.JSON(), nullable=True),
        sa.Column("last_transition", sa.String(length=32), nullable=False),
        sa.Column("last_transition_at", UTC_TIME, nullable=False),
        sa.ForeignKeyConstraint(
            ["machine_id"], ["machines.id"], name=op.f("fk_alarms_machine_id_machines")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_alarms")),
    )
    op.create_index(
        op.f("ix_alarms_machine_id_raised_at"), "alarms", ["machine_id", "raised_at"], unique=False
    )
    op.create_index(op.f("ix_alarms_raised_at"), "alarms", ["raised_at"], unique=False)
    op.create_index(
        op.f("ix_alarms_state_machine_id"), "alarms", ["state", "machine_id"], unique=False
    )

    op.create_table(
        "api_tokens",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("token_hash", sa.String(length=64), nullable=False),
        sa.Column("user_id", sa.Integer(), nullable=False),
        sa.Column("label", sa.String(length=200), nullable=False),
        sa.Column("created_at", UTC_TIME, nullable=False),
        sa.Column("revoked_at", UTC_TIME, nullable=True),
        sa.Column("last_used_at", UTC_TIME, nullable=True),
        sa.ForeignKeyConstraint(
            ["user_id"], ["users.id"], name=op.f("fk_api_tokens_user_id_users"), ondelete="CASCADE"
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_api_tokens")),
        sa.UniqueConstraint("token_hash", name=op.f("uq_api_tokens_token_hash")),
    )
    op.create_table(
        "detector_state",
        sa.Column("machine_id", sa.String(length=64), nullable=False),
        sa.Column("state", sa.JSON(), nullable=False),
        sa.Column("ts", UTC_TIME, nullable=True),
        sa.Column("updated_at", UTC_TIME, nullable=False),
        sa.ForeignKeyConstraint(
            ["machine_id"],
            ["machines.id"],
            name=op.f("fk_detector_state_machine_id_machines"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("machine_id", name=op.f("pk_detector_state")),
    )
    op.create_table(
        "measurement_points",
        sa.Column("machine_id", sa.String(length=64), nullable=False),
        sa.Column("id", sa.String(length=64), nullable=False),
        sa.Column("direction", sa.String(length=32), nullable=False),
        sa.Column("quantity", sa.String(length=32), nullable=False),
        sa.Column("unit", sa.String(length=16), nullable=False),
        sa.Column("fs_hz", sa.Float(), nullable=True),
        sa.Column("limits_mm_s", sa.JSON(), nullable=True),
        sa.Column("active", sa.Boolean(), nullable=False),
        sa.Column("position", sa.Integer(), nullable=False),
        sa.ForeignKeyConstraint(
            ["machine_id"],
            ["machines.id"],
            name=op.f("fk_measurement_points_machine_id_machines"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("machine_id", "id", name=op.f("pk_measurement_points")),
    )
    op.create_table(
        "mode_history",
        sa.Column("id", BIG_ID, nullable=False),
        sa.Column("machine_id", sa.String(length=64), nullable=False),
        sa.Column("mode_name", sa.String(length=200), nullable=False),
        sa.Column("change", sa.String(length=16), nullable=False),
        sa.Column("changed_by", sa.String(length=100), nullable=False),
        sa.Column("changed_at", UTC_TIME, nullable=False),
        sa.Column("old_values", sa.JSON(), nullable=True),
        sa.Column("new_values", sa.JSON(), nullable=True),
        sa.ForeignKeyConstraint(
            ["machine_id"], ["machines.id"], name=op.f("fk_mode_history_machine_id_machines")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_mode_history")),
    )
    op.create_index(
        op.f("ix_mode_history_machine_id_changed_at"),
        "mode_history",
        ["machine_id", "changed_at"],
        unique=False,
    )

    op.create_table(
        "modes",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("machine_id", sa.String(length=64), nullable=False),
        sa.Column("name", sa.String(length=200), nullable=False),
        sa.Column("frequency_hz", sa.Float(), nullable=False),
        sa.Column("damping_ratio", sa.Float(), nullable=True),
        sa.Column("amplification_factor", sa.Float(), nullable=True),
        sa.Column("required_margin_pct", sa.Float(), nullable=True),
        sa.Column("source", sa.String(length=200), nullable=False),
        sa.Column("date", sa.Date(), nullable=True),
        sa.Column("position", sa.Integer(), nullable=False),
        sa.Column("updated_at", UTC_TIME, nullable=False),
        sa.ForeignKeyConstraint(
            ["machine_id"],
            ["machines.id"],
            name=op.f("fk_modes_machine_id_machines"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_modes")),
        sa.UniqueConstraint("machine_id", "name", name=op.f("uq_modes_machine_id_name")),
    )
    op.create_table(
        "speed_readings",
        sa.Column("id", BIG_ID, nullable=False),
        sa.Column("machine_id", sa.String(length=64), nullable=False),
        sa.Column("ts", UTC_TIME, nullable=False),
        sa.Column("speed_hz", sa.Float(), nullable=False),
        sa.ForeignKeyConstraint(
            ["machine_id"], ["machines.id"], name=op.f("fk_speed_readings_machine_id_machines")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_speed_readings")),
        sa.UniqueConstraint("machine_id", "ts", name=op.f("uq_speed_readings_machine_id_ts")),
    )
    op.create_index(op.f("ix_speed_readings_ts"), "speed_readings", ["ts"], unique=False)

    op.create_table(
        "measurements",
        sa.Column("id", BIG_ID, nullable=False),
        sa.Column("machine_id", sa.String(length=64), nullable=False),
        sa.Column("point_id", sa.String(length=64), nullable=False),
        sa.Column("ts", UTC_TIME, nullable=False),
        sa.Column("reading_id", sa.String(length=128), nullable=True),
        sa.Column("speed_hz", sa.Float(), nullable=True),
        sa.Column("speed_source", sa.String(length=16), nullable=True),
        sa.Column("speed_uncertainty_hz", sa.Float(), nullable=True),
        sa.Column("overall_velocity_mm_s_rms", sa.Float(), nullable=True),
        sa.Column("one_x_normalised", sa.Float(), nullable=True),
        sa.Column("orders", sa.JSON(), nullable=False),
        sa.Column("peaks", sa.JSON(), nullable=False),
        sa.Column("zone", sa.String(length=8), nullable=True),
        sa.Column("health", sa.JSON(), nullable=True),
        sa.Column("evaluation", sa.JSON(), nullable=True),
        sa.Column("stored_at", UTC_TIME, nullable=False),
        sa.ForeignKeyConstraint(
            ["machine_id", "point_id"],
            ["measurement_points.machine_id", "measurement_points.id"],
            name=op.f("fk_measurements_machine_id_point_id_measurement_points"),
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_measurements")),
        sa.UniqueConstraint(
            "machine_id", "point_id", "ts", name=op.f("uq_measurements_machine_id_point_id_ts")
        ),
    )
    op.create_index(op.f("ix_measurements_ts"), "measurements", ["ts"], unique=False)

    op.create_table(
        "spectrum_snapshots",
        sa.Column("id", BIG_ID, nullable=False),
        sa.Column("machine_id", sa.String(length=64), nullable=False),
        sa.Column("point_id", sa.String(length=64), nullable=False),
        sa.Column("ts", UTC_TIME, nullable=False),
        sa.Column("kind", sa.String(length=16), nullable=False),
        sa.Column("unit", sa.String(length=16), nullable=False),
        sa.Column("scaling", sa.String(length=8), nullable=False),
        sa.Column("f0_hz", sa.Float(), nullable=False),
        sa.Column("df_hz", sa.Float(), nullable=False),
        sa.Column("n_bins", sa.Integer(), nullable=False),
        sa.Column("amplitudes", sa.LargeBinary(), nullable=False),
        sa.Column("evidence", sa.Boolean(), nullable=False),
        sa.ForeignKeyConstraint(
            ["machine_id", "point_id"],
            ["measurement_points.machine_id", "measurement_points.id"],
            name=op.f("fk_spectrum_snapshots_machine_id_point_id_measurement_points"),
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_spectrum_snapshots")),
        sa.UniqueConstraint(
            "machine_id",
            "point_id",
            "ts",
            "kind",
            name=op.f("uq_spectrum_snapshots_machine_id_point_id_ts_kind"),
        ),
    )
    op.create_index(op.f("ix_spectrum_snapshots_ts"), "spectrum_snapshots", ["ts"], unique=False)

    op.create_table(
        "alarm_transitions",
        sa.Column("id", BIG_ID, nullable=False),
        sa.Column("alarm_id", BIG_ID, nullable=False),
        sa.Column("transition", sa.String(length=32), nullable=False),
        sa.Column("severity", sa.String(length=16), nullable=False),
        sa.Column("state", sa.String(length=16), nullable=False),
        sa.Column("at", UTC_TIME, nullable=False),
        sa.Column("evidence", sa.JSON(), nullable=True),
        sa.Column("spectrum_snapshot_id", BIG_ID, nullable=True),
        sa.Column("user", sa.String(length=100), nullable=True),
        sa.ForeignKeyConstraint(
            ["alarm_id"], ["alarms.id"], name=op.f("fk_alarm_transitions_alarm_id_alarms")
        ),
        sa.ForeignKeyConstraint(
            ["spectrum_snapshot_id"],
            ["spectrum_snapshots.id"],
            name=op.f("fk_alarm_transitions_spectrum_snapshot_id_spectrum_snapshots"),
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_alarm_transitions")),
        sa.UniqueConstraint(
            "alarm_id", "transition", "at", name=op.f("uq_alarm_transitions_alarm_id_transition_at")
        ),
    )
    op.create_index(op.f("ix_alarm_transitions_at"), "alarm_transitions", ["at"], unique=False)


def downgrade() -> None:
    op.drop_index(op.f("ix_alarm_transitions_at"), table_name="alarm_transitions")

    op.drop_table("alarm_transitions")
    op.drop_index(op.f("ix_spectrum_snapshots_ts"), table_name="spectrum_snapshots")

    op.drop_table("spectrum_snapshots")
    op.drop_index(op.f("ix_measurements_ts"), table_name="measurements")

    op.drop_table("measurements")
    op.drop_index(op.f("ix_speed_readings_ts"), table_name="speed_readings")

    op.drop_table("speed_readings")
    op.drop_table("modes")
    op.drop_index(op.f("ix_mode_history_machine_id_changed_at"), table_name="mode_history")

    op.drop_table("mode_history")
    op.drop_table("measurement_points")
    op.drop_table("detector_state")
    op.drop_table("api_tokens")
    op.drop_index(op.f("ix_alarms_state_machine_id"), table_name="alarms")
    op.drop_index(op.f("ix_alarms_raised_at"), table_name="alarms")
    op.drop_index(op.f("ix_alarms_machine_id_raised_at"), table_name="alarms")

    op.drop_table("alarms")
    op.drop_table("users")
    op.drop_table("machines")
    op.drop_index(op.f("ix_dead_letters_reason"), table_name="dead_letters")
    op.drop_index(op.f("ix_dead_letters_at"), table_name="dead_letters")

    op.drop_table("dead_letters")
