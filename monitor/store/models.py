"""SQLAlchemy 2.x models of the whirlwatch store.

Tables (docs/store.md gives the full schema and the retention policy): the registry
(``machines``, ``measurement_points``, ``modes``, ``mode_history``, ``registry_state``,
``baseline_restarts``); readings (``measurements`` unique on machine, point and ts,
``speed_readings``, compressed float32 ``spectrum_snapshots`` and
``waveform_snapshots``); alarms (``alarms``, ``alarm_transitions``, never thinned);
people (``users``, ``api_tokens``, ``audit_events``); ``dead_letters``; the service's own
state (``detector_state``, ``passage_trackers``, ``machine_status``); ``passages`` with
their Bode points and candidate modes. Notification deliveries and out-of-service
periods have modules of their own (delivery_models, out_of_service).

Times are stored as UTC: ``UTCDateTime`` accepts aware datetimes, stores naive UTC on
SQLite (which has no time zone type) and ``timestamptz`` on PostgreSQL, and always
returns aware UTC datetimes.
"""

from __future__ import annotations

import datetime as dt
import zlib
from typing import Any

import numpy as np
from sqlalchemy import (
    JSON,
    BigInteger,
    Boolean,
    Date,
    DateTime,
    Float,
    ForeignKey,
    ForeignKeyConstraint,
    Index,
    Integer,
    LargeBinary,
    MetaData,
    String,
    Text,
    UniqueConstraint,
)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column, relationship
from sqlalchemy.types import TypeDecorator

# Explicit constraint names so migrations and models compare equal on every backend.
NAMING_CONVENTION = {
    "ix": "ix_%(table_name)s_%(column_0_N_name)s",
    "uq": "uq_%(table_name)s_%(column_0_N_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_N_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}

ROLES = ("viewer", "engineer", "admin")
SPECTRUM_KINDS = ("native", "velocity")

# SQLite only makes INTEGER PRIMARY KEY an auto-incrementing rowid alias.
BigId = BigInteger().with_variant(Integer(), "sqlite")


class UTCDateTime(TypeDecorator[dt.datetime]):
    """A datetime stored as UTC and returned time-zone aware (UTC)."""

    impl = DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value: dt.datetime | None, dialect: Any) -> dt.datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError(f"naive datetime {value!r} given; store times as aware UTC.")
        value = value.astimezone(dt.UTC)
        if dialect.name == "sqlite":
            return value.replace(tzinfo=None)
        return value

    def process_result_value(self, value: dt.datetime | None, dialect: Any) -> dt.datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            return value.replace(tzinfo=dt.UTC)
        return value.astimezone(dt.UTC)


def utcnow() -> dt.datetime:
    return dt.datetime.now(dt.UTC)


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING_CONVENTION)
    type_annotation_map = {dict[str, Any]: JSON, list[Any]: JSON, dt.datetime: UTCDateTime}


# ----------------------------------------------------------------------------- registry


class Machine(Base):
    __tablename__ = "machines"
    # The overview's order by name read in index order.
    __table_args__ = (Index(None, "name", "id"),)

    id: Mapped[str] = mapped_column(String(64), primary_key=True)
    name: Mapped[str] = mapped_column(String(200), default="")
    location: Mapped[str] = mapped_column(String(200), default="")
    machine_class: Mapped[str] = mapped_column(String(32))
    speed_min_rpm: Mapped[float] = mapped_column(Float)
    speed_max_rpm: Mapped[float] = mapped_column(Float)
    excitation_orders: Mapped[list[Any]] = mapped_column(JSON)
    line_frequency_hz: Mapped[float | None] = mapped_column(Float)
    limits_mm_s: Mapped[list[Any] | None] = mapped_column(JSON)
    settings: Mapped[dict[str, Any]] = mapped_column(JSON, default=dict)
    # A machine dropped from the registry file is retired, not deleted: its history stays.
    active: Mapped[bool] = mapped_column(Boolean, default=True)
    position: Mapped[int] = mapped_column(Integer, default=0)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    updated_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    # The registry version (registry_state) of the last write that touched this machine,
    # its points or modes, or asked to restart its baselines: a running service reloads
    # the machines whose version moved past the one it holds.
    registry_version: Mapped[int] = mapped_column(BigInteger, default=0)
    # sha256 (hex) of the machine's entry as last imported from a registry file: a service
    # start applies a file entry only when it changed since, so edits made elsewhere stay.
    file_digest: Mapped[str | None] = mapped_column(String(64))

    points: Mapped[list[MeasurementPoint]] = relationship(
        back_populates="machine", order_by="MeasurementPoint.position"
    )
    modes: Mapped[list[Mode]] = relationship(
        back_populates="machine", order_by="Mode.position", cascade="all, delete-orphan"
    )


class MeasurementPoint(Base):
    __tablename__ = "measurement_points"

    machine_id: Mapped[str] = mapped_column(
        String(64), ForeignKey("machines.id", ondelete="CASCADE"), primary_key=True
    )
    id: Mapped[str] = mapped_column(String(64), primary_key=True)
    direction: Mapped[str] = mapped_column(String(32))
    quantity: Mapped[str] = mapped_column(String(32))
    unit: Mapped[str] = mapped_column(String(16))
    fs_hz: Mapped[float | None] = mapped_column(Float)
    limits_mm_s: Mapped[list[Any] | None] = mapped_column(JSON)
    active: Mapped[bool] = mapped_column(Boolean, default=True)
    position: Mapped[int] = mapped_column(Integer, default=0)

    machine: Mapped[Machine] = relationship(back_populates="points")


class Mode(Base):
    __tablename__ = "modes"
    __table_args__ = (UniqueConstraint("machine_id", "name"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    machine_id: Mapped[str] = mapped_column(
        String(64), ForeignKey("machines.id", ondelete="CASCADE")
    )
    name: Mapped[str] = mapped_column(String(200))
    frequency_hz: Mapped[float] = mapped_column(Float)
    damping_ratio: Mapped[float | None] = mapped_column(Float)
    amplification_factor: Mapped[float | None] = mapped_column(Float)
    required_margin_pct: Mapped[float | None] = mapped_column(Float)
    source: Mapped[str] = mapped_column(String(200), default="")
    date: Mapped[dt.date | None] = mapped_column(Date)
    position: Mapped[int] = mapped_column(Integer, default=0)
    updated_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)

    machine: Mapped[Machine] = relationship(back_populates="modes")

    def values(self) -> dict[str, Any]:
        """The mode's registry values as JSON-ready data (what mode_history records)."""
        return {
            "name": self.name,
            "frequency_hz": self.frequency_hz,
            "damping_ratio": self.damping_ratio,
            "amplification_factor": self.amplification_factor,
            "required_margin_pct": self.required_margin_pct,
            "source": self.source,
            "date": self.date.isoformat() if self.date else None,
        }


class ModeHistory(Base):
    """One row per change of a mode: created, updated or deleted, by whom and when."""

    __tablename__ = "mode_history"
    __table_args__ = (Index(None, "machine_id", "changed_at"),)

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    # No foreign key to modes: the history of a deleted mode stays.
    machine_id: Mapped[str] = mapped_column(String(64), ForeignKey("machines.id"))
    mode_name: Mapped[str] = mapped_column(String(200))
    change: Mapped[str] = mapped_column(String(16))
    changed_by: Mapped[str] = mapped_column(String(100))
    changed_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    old_values: Mapped[dict[str, Any] | None] = mapped_column(JSON)
    new_values: Mapped[dict[str, Any] | None] = mapped_column(JSON)


class RegistryState(Base):
    """One row (id 1): the registry version, moved on by one in every transaction that
    writes the registry (import, mode edit, baseline restart request)."""

    __tablename__ = "registry_state"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    version: Mapped[int] = mapped_column(BigInteger, default=0)
    updated_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class BaselineRestart(Base):
    """An engineer's request to learn a machine's baselines again (after maintenance):
    for one point, or every point when ``point_id`` is None. The service applies it to
    its detectors and sets ``applied_at``."""

    __tablename__ = "baseline_restarts"
    __table_args__ = (Index(None, "machine_id", "requested_at"),)

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    machine_id: Mapped[str] = mapped_column(String(64), ForeignKey("machines.id"))
    # No foreign key: the record stays when the point is later retired.
    point_id: Mapped[str | None] = mapped_column(String(64))
    comment: Mapped[str] = mapped_column(Text)
    requested_by: Mapped[str] = mapped_column(String(100))
    requested_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    applied_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)


# ----------------------------------------------------------------------------- readings


class Measurement(Base):
    """Features of one analysed waveform."""

    __tablename__ = "measurements"
    __table_args__ = (
        # The idempotence key; also serves "latest per point" and time-range scans.
        UniqueConstraint("machine_id", "point_id", "ts"),
        ForeignKeyConstraint(
            ["machine_id", "point_id"],
            ["measurement_points.machine_id", "measurement_points.id"],
        ),
        Index(None, "ts"),
    )

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    machine_id: Mapped[str] = mapped_column(String(64))
    point_id: Mapped[str] = mapped_column(String(64))
    ts: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    reading_id: Mapped[str | None] = mapped_column(String(128))
    speed_hz: Mapped[float | None] = mapped_column(Float)
    speed_source: Mapped[str | None] = mapped_column(String(16))
    speed_uncertainty_hz: Mapped[float | None] = mapped_column(Float)
    overall_velocity_mm_s_rms: Mapped[float | None] = mapped_column(Float)
    one_x_normalised: Mapped[float | None] = mapped_column(Float)
    orders: Mapped[list[Any]] = mapped_column(JSON, default=list)
    peaks: Mapped[list[Any]] = mapped_column(JSON, default=list)
    zone: Mapped[str | None] = mapped_column(String(8))
    health: Mapped[dict[str, Any] | None] = mapped_column(JSON)
    evaluation: Mapped[dict[str, Any] | None] = mapped_column(JSON)
    stored_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class SpectrumSnapshot(Base):
    """A stored spectrum: zlib-compressed little-endian float32 amplitudes.

    Bin ``k`` lies at ``f0_hz + k * df_hz`` (Hz); amplitudes are in ``unit`` with
    ``scaling`` ('peak' or 'rms'). ``evidence`` snapshots belong to alarm transitions
    and are never thinned.
    """

    __tablename__ = "spectrum_snapshots"
    __table_args__ = (
        UniqueConstraint("machine_id", "point_id", "ts", "kind"),
        ForeignKeyConstraint(
            ["machine_id", "point_id"],
            ["measurement_points.machine_id", "measurement_points.id"],
        ),
        Index(None, "ts"),
    )

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    machine_id: Mapped[str] = mapped_column(String(64))
    point_id: Mapped[str] = mapped_column(String(64))
    ts: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    kind: Mapped[str] = mapped_column(String(16))
    unit: Mapped[str] = mapped_column(String(16))
    scaling: Mapped[str] = mapped_column(String(8))
    f0_hz: Mapped[float] = mapped_column(Float)
    df_hz: Mapped[float] = mapped_column(Float)
    n_bins: Mapped[int] = mapped_column(Integer)
    amplitudes: Mapped[bytes] = mapped_column(LargeBinary)
    evidence: Mapped[bool] = mapped_column(Boolean, default=False)

    def amplitude_array(self) -> np.ndarray:
        """Amplitudes as float32, in ``unit``."""
        return np.frombuffer(zlib.decompress(self.amplitudes), dtype="<f4").astype(np.float32)

    def freq_hz(self) -> np.ndarray:
        """Bin frequencies, Hz."""
        return self.f0_hz + self.df_hz * np.arange(self.n_bins, dtype=np.float64)


def pack_amplitudes(amplitude: np.ndarray) -> bytes:
    """zlib of the little-endian float32 bytes of ``amplitude``."""
    return zlib.compress(np.ascontiguousarray(amplitude, dtype="<f4").tobytes(), 6)


class WaveformSnapshot(Base):
    """A stored raw time waveform: zlib-compressed little-endian float32 samples.

    Sample ``k`` was taken ``k / fs_hz`` s after ``ts``, in ``unit`` (the unit the
    sensor sent); ``speed_hz`` the running speed the analysis used (Hz), if any.
    ``evidence`` waveforms belong to alarm transitions and are never thinned.
    """

    __tablename__ = "waveform_snapshots"
    __table_args__ = (
        UniqueConstraint("machine_id", "point_id", "ts"),
        ForeignKeyConstraint(
            ["machine_id", "point_id"],
            ["measurement_points.machine_id", "measurement_points.id"],
        ),
        Index(None, "ts"),
    )

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    machine_id: Mapped[str] = mapped_column(String(64))
    point_id: Mapped[str] = mapped_column(String(64))
    ts: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    fs_hz: Mapped[float] = mapped_column(Float)
    unit: Mapped[str] = mapped_column(String(16))
    speed_hz: Mapped[float | None] = mapped_column(Float)
    n_samples: Mapped[int] = mapped_column(Integer)
    samples: Mapped[bytes] = mapped_column(LargeBinary)
    evidence: Mapped[bool] = mapped_column(Boolean, default=False)

    def sample_array(self) -> np.ndarray:
        """Samples as float32, in ``unit``."""
        return np.frombuffer(zlib.decompress(self.samples), dtype="<f4").astype(np.float32)


class SpeedReadingRow(Base):
    __tablename__ = "speed_readings"
    __table_args__ = (UniqueConstraint("machine_id", "ts"), Index(None, "ts"))

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    machine_id: Mapped[str] = mapped_column(String(64), ForeignKey("machines.id"))
    ts: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    speed_hz: Mapped[float] = mapped_column(Float)


# ----------------------------------------------------------------------------- alarms


class Alarm(Base):
    """One alarm instance from raise to clear; identity (machine, point, kind, subject)."""

    __tablename__ = "alarms"
    __table_args__ = (
        Index(None, "state", "machine_id"),
        Index(None, "machine_id", "raised_at"),
        Index(None, "raised_at"),
    )

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    # The alarm engine's own id of this alarm (monitor.detection.alarms), to relate MQTT events.
    ref: Mapped[str | None] = mapped_column(String(64))
    machine_id: Mapped[str] = mapped_column(String(64), ForeignKey("machines.id"))
    point_id: Mapped[str | None] = mapped_column(String(64))
    kind: Mapped[str] = mapped_column(String(32))
    subject: Mapped[str] = mapped_column(String(200), default="")
    severity: Mapped[str] = mapped_column(String(16))
    state: Mapped[str] = mapped_column(String(16))
    raised_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    cleared_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    acknowledged_by: Mapped[str | None] = mapped_column(String(100))
    acknowledged_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    ack_comment: Mapped[str | None] = mapped_column(Text)
    # Shelved until this time (ISA-18.2 shelving; monitor/store/shelving.py), by whom, why.
    shelved_until: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    shelved_by: Mapped[str | None] = mapped_column(String(100))
    shelve_comment: Mapped[str | None] = mapped_column(Text)
    evidence: Mapped[dict[str, Any] | None] = mapped_column(JSON)
    last_transition: Mapped[str] = mapped_column(String(32))
    last_transition_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)

    transitions: Mapped[list[AlarmTransitionRow]] = relationship(
        back_populates="alarm", order_by="AlarmTransitionRow.id"
    )


class AlarmTransitionRow(Base):
    __tablename__ = "alarm_transitions"
    __table_args__ = (
        # A replayed transition (same alarm, name and instant) is not stored twice.
        UniqueConstraint("alarm_id", "transition", "at"),
        Index(None, "at"),
    )

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    alarm_id: Mapped[int] = mapped_column(BigId, ForeignKey("alarms.id"))
    transition: Mapped[str] = mapped_column(String(32))
    severity: Mapped[str] = mapped_column(String(16))
    state: Mapped[str] = mapped_column(String(16))
    at: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    evidence: Mapped[dict[str, Any] | None] = mapped_column(JSON)
    spectrum_snapshot_id: Mapped[int | None] = mapped_column(
        BigId, ForeignKey("spectrum_snapshots.id")
    )
    user: Mapped[str | None] = mapped_column(String(100))
    shelved: Mapped[bool] = mapped_column(Boolean, default=False)  # recorded while shelved

    alarm: Mapped[Alarm] = relationship(back_populates="transitions")


# ----------------------------------------------------------------------------- people


class User(Base):
    __tablename__ = "users"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(100), unique=True)
    password_hash: Mapped[str] = mapped_column(String(256))
    role: Mapped[str] = mapped_column(String(16))
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    disabled: Mapped[bool] = mapped_column(Boolean, default=False)
    # Stored in each dashboard session; moving it on ends every session of the user.
    session_version: Mapped[int] = mapped_column(Integer, default=0, server_default="0")
    # Client addresses of the last successful sign-ins, newest last (login limiter).
    known_addresses: Mapped[list[Any]] = mapped_column(JSON, default=list, server_default="[]")

    tokens: Mapped[list[ApiToken]] = relationship(back_populates="user")


class ApiToken(Base):
    """An API token, stored as the sha256 hex digest of the token text only."""

    __tablename__ = "api_tokens"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    token_hash: Mapped[str] = mapped_column(String(64), unique=True)
    user_id: Mapped[int] = mapped_column(Integer, ForeignKey("users.id", ondelete="CASCADE"))
    label: Mapped[str] = mapped_column(String(200), default="")
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    revoked_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    last_used_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)

    user: Mapped[User] = relationship(back_populates="tokens")


class AuditEvent(Base):
    """A change to users, passwords, roles or tokens, and each sign-in and sign-out:
    who did it (``actor``), what (``action``, ``detail``), to whom (``target``), when
    and from which client address. Never thinned; users' deletion keeps their events."""

    __tablename__ = "audit_events"
    __table_args__ = (Index(None, "at"), Index(None, "target", "at"))

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    actor: Mapped[str] = mapped_column(String(100))
    action: Mapped[str] = mapped_column(String(32))
    target: Mapped[str] = mapped_column(String(100), default="")
    detail: Mapped[dict[str, Any]] = mapped_column(JSON, default=dict)
    address: Mapped[str] = mapped_column(String(64), default="")


# ----------------------------------------------------------------------------- service


class DeadLetter(Base):
    __tablename__ = "dead_letters"
    __table_args__ = (Index(None, "at"), Index(None, "reason"))

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)
    topic: Mapped[str] = mapped_column(String(512))
    reason: Mapped[str] = mapped_column(String(64))
    detail: Mapped[str] = mapped_column(Text, default="")
    payload_head: Mapped[bytes] = mapped_column(LargeBinary)
    payload_size: Mapped[int] = mapped_column(Integer)


class DetectorState(Base):
    """The detectors' state of one machine as JSON, written with each reading."""

    __tablename__ = "detector_state"

    machine_id: Mapped[str] = mapped_column(
        String(64), ForeignKey("machines.id", ondelete="CASCADE"), primary_key=True
    )
    state: Mapped[dict[str, Any]] = mapped_column(JSON)
    ts: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    updated_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class MachineStatus(Base):
    """The retained status of one active machine (monitor/service/payloads.py,
    docs/mqtt.md), as the service last built it, written in the transaction that built
    it; a blank one (no data) for a machine the service has not reported on yet
    (monitor/store/statuses.py). ``status`` is the body; the other columns repeat the
    parts the overview filters and sorts on: ``state_rank`` (0 severe, 1 alert, 2
    advisory: the worst severity of the active alarms; 3 normal; 4 no data yet) and the
    alarms' count, the running speed, the worst ISO 20816 zone with its point and overall
    level (mm/s RMS), and the nearest margin with its shortfall against the required
    margin (``margin_gap_pct``, percentage points)."""

    __tablename__ = "machine_status"
    # The overview's default order (worst first, then machine id) read in index order.
    __table_args__ = (Index(None, "state_rank", "machine_id"),)

    machine_id: Mapped[str] = mapped_column(
        String(64), ForeignKey("machines.id", ondelete="CASCADE"), primary_key=True
    )
    ts: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    state_rank: Mapped[int] = mapped_column(Integer)
    active_alarms: Mapped[int] = mapped_column(Integer, default=0)
    speed_hz: Mapped[float | None] = mapped_column(Float)
    speed_source: Mapped[str | None] = mapped_column(String(16))
    speed_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    zone: Mapped[str | None] = mapped_column(String(8))
    zone_point: Mapped[str | None] = mapped_column(String(64))
    overall_mm_s_rms: Mapped[float | None] = mapped_column(Float)
    margin_gap_pct: Mapped[float | None] = mapped_column(Float)
    running: Mapped[str | None] = mapped_column(String(16))  # 'running' / 'stopped' / None
    nearest_margin: Mapped[dict[str, Any] | None] = mapped_column(JSON)
    status: Mapped[dict[str, Any]] = mapped_column(JSON)
    updated_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


class PassageTrackerState(Base):
    """The live passage trackers of one machine's points as JSON
    (monitor/service/passages.py), written with its detector state."""

    __tablename__ = "passage_trackers"

    machine_id: Mapped[str] = mapped_column(
        String(64), ForeignKey("machines.id", ondelete="CASCADE"), primary_key=True
    )
    state: Mapped[dict[str, Any]] = mapped_column(JSON)
    updated_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, default=utcnow)


#: What became of a passage that matched no stored mode (``passages.candidate``).
CANDIDATE_STATES = ("open", "accepted", "rejected")


class PassageRow(Base):
    """One resonance passage of a run-up or coast-down at one point: ``seq`` numbers the
    passages of one sweep (ascending in speed). ``mode`` and ``shift_pct`` name the stored
    mode it matched and how far it lies from it; with no match it is a candidate mode
    (``candidate`` 'open' until an engineer accepts or rejects it). ``points``: the
    sweep's Bode points, ``[{"ts", "speed_hz", "amplitude", "phase_deg"}]``."""

    __tablename__ = "passages"
    __table_args__ = (
        UniqueConstraint("machine_id", "point_id", "started_at", "seq"),
        Index(None, "machine_id", "id"),
    )

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    machine_id: Mapped[str] = mapped_column(String(64), ForeignKey("machines.id"))
    point_id: Mapped[str] = mapped_column(String(64))
    seq: Mapped[int] = mapped_column(Integer)
    kind: Mapped[str] = mapped_column(String(16))
    method: Mapped[str] = mapped_column(String(16))
    started_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    ended_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    detected_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    natural_frequency_hz: Mapped[float] = mapped_column(Float)
    critical_speed_hz: Mapped[float] = mapped_column(Float)
    amplification_factor: Mapped[float] = mapped_column(Float)
    damping_ratio: Mapped[float] = mapped_column(Float)
    peak_amplitude: Mapped[float] = mapped_column(Float)
    unit: Mapped[str] = mapped_column(String(16))
    phase_at_peak_deg: Mapped[float | None] = mapped_column(Float)
    phase_change_deg: Mapped[float | None] = mapped_column(Float)
    mode: Mapped[str | None] = mapped_column(String(200))
    shift_pct: Mapped[float | None] = mapped_column(Float)
    points: Mapped[list[Any]] = mapped_column(JSON)
    candidate: Mapped[str | None] = mapped_column(String(16))
    decided_by: Mapped[str | None] = mapped_column(String(100))
    decided_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime)
    accepted_mode: Mapped[str | None] = mapped_column(String(200))

# The notification delivery records live in their own module (one idea; models.py's size).
from monitor.store.delivery_models import NotificationDelivery  # noqa: E402,F401
