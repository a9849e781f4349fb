"""Retention: thin old measurements, speed readings and spectra; keep alarm history.

Policy (defaults; see docs/store.md and the ``retention`` settings):

- measurements and speed readings younger than ``raw_days`` (30): all kept;
- from ``raw_days`` to ``hourly_days`` (365) old: the first row of each point (machine,
  for speed) in each UTC hour kept;
- older than ``hourly_days``: the first row of each point in each UTC day kept;
- cadence spectrum snapshots younger than ``spectra_raw_days`` (30): all kept; older:
  the first of each point and kind per UTC day kept;
- cadence raw waveforms: as the cadence spectra (all kept for ``spectra_raw_days``, then
  the first of each point per UTC day);
- evidence snapshots and evidence waveforms (those attached to alarm transitions) are never deleted, nor are
  alarms and alarm transitions, nor mode history;
- dead letters older than ``dead_letter_days`` (30) are deleted.

Tier edges are floored to whole hours/days so the buckets never straddle a tier edge,
and thinning is idempotent: running it again deletes nothing more.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from typing import Any, cast

from sqlalchemy import BigInteger, ColumnElement, CursorResult, and_, delete, exists, func, select
from sqlalchemy.ext.compiler import compiles
from sqlalchemy.orm import Session
from sqlalchemy.sql.expression import FunctionElement

from monitor.store.models import (
    AlarmTransitionRow,
    DeadLetter,
    Measurement,
    SpectrumSnapshot,
    SpeedReadingRow,
    WaveformSnapshot,
    utcnow,
)


class epoch_seconds(FunctionElement[int]):  # noqa: N801 - SQL function name
    """Whole seconds since 1970-01-01 UTC of a UTCDateTime column, per dialect."""

    type = BigInteger()
    inherit_cache = True


@compiles(epoch_seconds, "sqlite")
def _epoch_sqlite(element: Any, compiler: Any, **kw: Any) -> str:
    return f"CAST(strftime('%s', {compiler.process(element.clauses, **kw)}) AS INTEGER)"


@compiles(epoch_seconds, "postgresql")
def _epoch_pg(element: Any, compiler: Any, **kw: Any) -> str:
    return f"CAST(FLOOR(EXTRACT(EPOCH FROM {compiler.process(element.clauses, **kw)})) AS BIGINT)"


@dataclass(frozen=True)
class RetentionPolicy:
    """Ages in days; see the module docstring."""

    raw_days: float = 30.0
    hourly_days: float = 365.0
    spectra_raw_days: float = 30.0
    dead_letter_days: float = 30.0

    def __post_init__(self) -> None:
        for name in ("raw_days", "hourly_days", "spectra_raw_days", "dead_letter_days"):
            v = getattr(self, name)
            if not v > 0:
                raise ValueError(f"retention {name} must be a positive number of days, got {v!r}.")
        if self.hourly_days < self.raw_days:
            raise ValueError(
                f"retention hourly_days ({self.hourly_days}) must not be below raw_days ({self.raw_days})."
            )


@dataclass(frozen=True)
class RetentionResult:
    """Rows deleted per table."""

    measurements: int = 0
    speed_readings: int = 0
    spectrum_snapshots: int = 0
    dead_letters: int = 0
    waveform_snapshots: int = 0


def _floor(t: dt.datetime, seconds: int) -> dt.datetime:
    epoch = dt.datetime(1970, 1, 1, tzinfo=dt.UTC)
    n = int((t - epoch).total_seconds()) // seconds
    return epoch + dt.timedelta(seconds=n * seconds)


def _thin(
    session: Session,
    model: Any,
    partition: list[Any],
    lo: dt.datetime | None,
    hi: dt.datetime,
    bucket_s: int,
    extra: ColumnElement[bool] | None = None,
) -> int:
    """Delete all but the earliest row per partition and bucket with lo <= ts < hi."""
    where = [model.ts < hi]
    if lo is not None:
        where.append(model.ts >= lo)
    if extra is not None:
        where.append(extra)
    bucket = epoch_seconds(model.ts) // bucket_s
    ranked = (
        select(
            model.id.label("id"),
            func.row_number()
            .over(partition_by=[*partition, bucket], order_by=(model.ts, model.id))
            .label("rn"),
        )
        .where(and_(*where))
        .subquery()
    )
    doomed = select(ranked.c.id).where(ranked.c.rn > 1)
    result = cast(CursorResult[Any], session.execute(
        delete(model).where(model.id.in_(doomed)).execution_options(synchronize_session=False)
    ))  # a DELETE's result is a CursorResult: it has the row count
    return int(result.rowcount or 0)


def apply_retention(
    session: Session, policy: RetentionPolicy | None = None, *, now: dt.datetime | None = None
) -> RetentionResult:
    """Thin the store by ``policy`` as of ``now`` (inside the caller's transaction)."""
    policy = policy or RetentionPolicy()
    now = now or utcnow()
    hour, day = 3600, 86400
    raw_edge = _floor(now - dt.timedelta(days=policy.raw_days), hour)
    hourly_edge = _floor(now - dt.timedelta(days=policy.hourly_days), day)
    spectra_edge = _floor(now - dt.timedelta(days=policy.spectra_raw_days), day)

    m_part = [Measurement.machine_id, Measurement.point_id]
    n_meas = _thin(session, Measurement, m_part, hourly_edge, raw_edge, hour)
    n_meas += _thin(session, Measurement, m_part, None, hourly_edge, day)

    s_part = [SpeedReadingRow.machine_id]
    n_speed = _thin(session, SpeedReadingRow, s_part, hourly_edge, raw_edge, hour)
    n_speed += _thin(session, SpeedReadingRow, s_part, None, hourly_edge, day)

    not_evidence = and_(
        SpectrumSnapshot.evidence.is_(False),
        ~exists().where(AlarmTransitionRow.spectrum_snapshot_id == SpectrumSnapshot.id),
    )
    n_spec = _thin(
        session,
        SpectrumSnapshot,
        [SpectrumSnapshot.machine_id, SpectrumSnapshot.point_id, SpectrumSnapshot.kind],
        None,
        spectra_edge,
        day,
        not_evidence,
    )
    n_wave = _thin(session, WaveformSnapshot, [WaveformSnapshot.machine_id, WaveformSnapshot.point_id],
                   None, spectra_edge, day, WaveformSnapshot.evidence.is_(False))
    dead_edge = now - dt.timedelta(days=policy.dead_letter_days)
    n_dead = cast(CursorResult[Any], session.execute(delete(DeadLetter).where(DeadLetter.at < dead_edge))).rowcount or 0
    return RetentionResult(
        measurements=n_meas,
        speed_readings=n_speed,
        spectrum_snapshots=n_spec,
        dead_letters=int(n_dead),
        waveform_snapshots=n_wave,
    )
