"""The service's writes, each inside the caller's transaction (the caller commits).

The service's batch writer (monitor/service/batch.py) is the one writer of readings: rows
from :func:`measurement_values`, :func:`snapshot_rows`, :func:`waveform_row`,
:func:`speed_reading_values` (and monitor/store/passage_writes.py ``passage_values``),
inserted with :func:`insert_many_ignore` (``INSERT ... ON CONFLICT DO NOTHING``: a
redelivered or raced reading inserts nothing); :func:`record_transitions`,
:func:`save_detector_states` (and ``save_passage_trackers`` there). The dashboard's one
write here is :func:`acknowledge_alarm`.
"""
from __future__ import annotations

import datetime as dt
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, cast

import numpy as np
from sqlalchemy import Connection, Table, and_, bindparam, select, update
from sqlalchemy.dialects import postgresql, sqlite
from sqlalchemy.orm import Session

from monitor.analysis.waveform import ReadingAnalysis, Spectrum
from monitor.detection.alarms import Transition
from monitor.model.jsonsafe import jsonable
from monitor.model.readings import SpeedReading, Waveform
from monitor.store.models import (
    Alarm,
    AlarmTransitionRow,
    DeadLetter,
    DetectorState,
    Measurement,
    SpectrumSnapshot,
    SpeedReadingRow,
    WaveformSnapshot,
    pack_amplitudes,
    utcnow,
)
from monitor.store.shelving import inherit_shelf, is_suppressed

CLOSED_STATES = frozenset({"cleared"})
#: The unique key of a stored spectrum.
SNAPSHOT_KEY = ("machine_id", "point_id", "ts", "kind")
# The ORM types a model's __table__ as any FromClause; this is its Table.
_SNAPSHOTS = cast(Table, SpectrumSnapshot.__table__)
DEAD_LETTER_HEAD_BYTES = 256


# ----------------------------------------------------------------------------- helpers


def to_datetime(t: float | int | dt.datetime) -> dt.datetime:
    """Epoch seconds UTC or an aware datetime -> aware UTC datetime (microseconds)."""
    if isinstance(t, dt.datetime):
        if t.tzinfo is None:
            raise ValueError(f"time {t!r} is naive; give an aware UTC datetime or epoch seconds.")
        return t.astimezone(dt.UTC)
    if isinstance(t, bool) or not isinstance(t, int | float) or not math.isfinite(t):
        raise ValueError(f"time {t!r} must be finite epoch seconds or an aware datetime.")
    # Round to the microsecond the database keeps, so a replay compares equal.
    return dt.datetime(1970, 1, 1, tzinfo=dt.UTC) + dt.timedelta(microseconds=round(t * 1e6))


#: Statements of the service's hot path, built once per key: building a SQLAlchemy
#: statement (coercions, cache key, ``excluded`` columns) costs about as much as running
#: it on SQLite, and a batch of one reading runs several.
_STATEMENTS: dict[tuple[Any, ...], Any] = {}


def dialect_name(db: Session | Connection) -> str:
    """The dialect of a Session or of a Core Connection (the service runs its hot
    statements on the session's connection: the ORM layer costs more than SQLite does)."""
    return db.dialect.name if isinstance(db, Connection) else db.get_bind().dialect.name


def cached_statement(key: tuple[Any, ...], build: Any) -> Any:
    """The statement cached under ``key``, built by ``build()`` the first time."""
    stmt = _STATEMENTS.get(key)
    if stmt is None:
        stmt = _STATEMENTS[key] = build()
    return stmt


def finite_or_none(x: Any) -> float | None:
    """``x`` as a float, or None when it is None, NaN or infinite (stored as NULL)."""
    if x is None:
        return None
    v = float(x)
    return v if math.isfinite(v) else None


def insert_ignore(session: Session, table: Table, values: Mapping[str, Any], keys: Sequence[str]) -> Any:
    """``INSERT ... ON CONFLICT (keys) DO NOTHING RETURNING id``: the new id, or None
    when a row with the same key exists."""
    dialect = dialect_name(session)
    ins_mod = postgresql if dialect == "postgresql" else sqlite
    stmt = (
        ins_mod.insert(table)
        .values(**values)
        .on_conflict_do_nothing(index_elements=list(keys))
        .returning(table.c.id)
    )
    return session.execute(stmt).scalar_one_or_none()


# ----------------------------------------------------------------------------- readings


def orders_json(analysis: ReadingAnalysis) -> list[dict[str, Any]]:  # the stored order rows
    return [
        {
            "order": finite_or_none(o.order),
            "frequency_hz": finite_or_none(o.frequency_hz),
            "amplitude": finite_or_none(o.amplitude),
            "velocity_mm_s": finite_or_none(o.velocity_mm_s),
            "phase_deg": finite_or_none(o.phase_deg),
        }
        for o in analysis.orders
    ]


def spectrum_row(
    machine: str, point: str, ts: float | dt.datetime, kind: str, spectrum: Spectrum, *, evidence: bool = False
) -> dict[str, Any]:
    """The ``spectrum_snapshots`` row of one spectrum of a point's reading at ``ts``."""
    freq = np.asarray(spectrum.freq_hz, dtype=np.float64)
    amp = np.asarray(spectrum.amplitude)
    return {
        "machine_id": machine,
        "point_id": point,
        "ts": to_datetime(ts),
        "kind": kind,
        "unit": spectrum.unit,
        "scaling": spectrum.scaling,
        "f0_hz": float(freq[0]) if freq.size else 0.0,
        "df_hz": float(spectrum.resolution_hz),
        "n_bins": int(amp.size),
        "amplitudes": pack_amplitudes(amp),
        "evidence": evidence,
    }


def waveform_row(w: Waveform, speed_hz: float | None, *, evidence: bool = False) -> dict[str, Any]:
    """The ``waveform_snapshots`` row of a reading's raw samples (float32, the sensor's
    unit); ``speed_hz`` the running speed its analysis used, Hz."""
    samples = np.asarray(w.samples)
    return {"machine_id": w.machine, "point_id": w.point, "ts": to_datetime(w.ts), "fs_hz": float(w.fs_hz),
            "unit": w.unit, "speed_hz": finite_or_none(speed_hz), "n_samples": int(samples.size),
            "samples": pack_amplitudes(samples), "evidence": evidence}


def measurement_values(
    analysis: ReadingAnalysis | Waveform,
    *,
    zone: str | None = None,
    health: Any = None,
    evaluation: Mapping[str, Any] | None = None,
) -> dict[str, Any]:
    """The ``measurements`` row of one analysed reading, or of a waveform the analysis
    could not use (no features, orders or peaks; its speed as measured, if it carried one).

    ``health`` is converted to JSON (:func:`jsonable`); ``evaluation`` is the detector's
    own JSON form (``ReadingEvaluation.to_json``), stored as given: converting it again
    would cost about 40 us per reading (measured; 3 % of its cost). The store's JSON
    serialiser turns NaN into null (store/db.py). ``stored_at`` is stamped now; the batch
    writer stamps it again just before its insert."""
    if isinstance(analysis, Waveform):
        w = analysis
        return {
            "machine_id": w.machine,
            "point_id": w.point,
            "ts": to_datetime(w.ts),
            "reading_id": w.reading_id,
            "speed_hz": finite_or_none(w.speed_hz),
            "speed_source": "measured" if w.speed_hz is not None else None,
            "speed_uncertainty_hz": None,
            "overall_velocity_mm_s_rms": None,
            "one_x_normalised": None,
            "orders": [],
            "peaks": [],
            "zone": zone,
            "health": jsonable(health),
            "evaluation": evaluation,
            "stored_at": utcnow(),
        }
    return {
        "machine_id": analysis.machine,
        "point_id": analysis.point,
        "ts": to_datetime(analysis.ts),
        "reading_id": analysis.reading_id,
        "speed_hz": finite_or_none(analysis.speed_hz),
        "speed_source": analysis.speed_source,
        "speed_uncertainty_hz": finite_or_none(analysis.speed_uncertainty_hz),
        "overall_velocity_mm_s_rms": finite_or_none(analysis.overall_velocity_mm_s_rms),
        "one_x_normalised": finite_or_none(analysis.one_x_normalised),
        "orders": orders_json(analysis),
        "peaks": [{"hz": finite_or_none(p.hz), "amplitude": finite_or_none(p.amplitude)} for p in analysis.peaks],
        "zone": zone,
        "health": jsonable(health),
        "evaluation": evaluation,
        "stored_at": utcnow(),
    }


def snapshot_rows(
    analysis: ReadingAnalysis, *, evidence: bool = False, envelope: bool = False
) -> list[dict[str, Any]]:
    """The ``spectrum_snapshots`` rows (native, then velocity; then the bearing envelope
    spectrum when ``envelope`` and the analysis has one) of one analysed reading."""
    ts = to_datetime(analysis.ts)
    kinds: list[tuple[str, Spectrum | None]] = [("native", analysis.spectrum),
                                                ("velocity", analysis.velocity_spectrum)]
    if envelope:
        kinds.append(("envelope", analysis.envelope_spectrum))
    return [spectrum_row(analysis.machine, analysis.point, ts, kind, spectrum, evidence=evidence)
            for kind, spectrum in kinds if spectrum is not None]


def keep_evidence_snapshots(session: Session, rows: Sequence[Mapping[str, Any]]) -> list[int]:
    """Store ``snapshot_rows(..., evidence=True)`` as alarm evidence; the id of each row, in
    order. A spectrum stored already (by the snapshot cadence, or as the evidence of an
    earlier transition) is not stored again: its row is marked evidence, so retention keeps
    it, and its id returned."""
    t = _SNAPSHOTS.c
    ids: list[int] = []
    for row in rows:
        sid = insert_ignore(session, _SNAPSHOTS, row, SNAPSHOT_KEY)
        if sid is None:
            sid = session.execute(select(t.id).where(
                t.machine_id == row["machine_id"], t.point_id == row["point_id"], t.ts == row["ts"],
                t.kind == row["kind"])).scalar_one()
            mark_evidence(session, [sid])
        ids.append(int(sid))
    return ids


def mark_evidence(session: Session, snapshot_ids: Sequence[int]) -> None:
    """Mark stored spectra as alarm evidence (retention never thins them)."""
    if snapshot_ids:
        t = _SNAPSHOTS
        session.execute(update(t).where(t.c.id.in_(list(snapshot_ids)), t.c.evidence.is_(False))
                        .values(evidence=True))


def insert_many_ignore(
    session: Session | Connection, table: Table, rows: Sequence[Mapping[str, Any]], keys: Sequence[str]
) -> int:
    """Multi-row ``INSERT ... ON CONFLICT (keys) DO NOTHING``; returns how many rows were
    new (rows whose key already exists are skipped). All rows must have the same columns."""
    if not rows:
        return 0
    dialect = dialect_name(session)
    ins_mod = postgresql if dialect == "postgresql" else sqlite
    # One statement executed with many parameter sets: SQLAlchemy sends it as batched
    # multi-row VALUES ("insertmanyvalues") and compiles it once, not once per row count.
    stmt = cached_statement(("insert_many_ignore", dialect, table.name, tuple(keys)), lambda: (
        ins_mod.insert(table)
        .on_conflict_do_nothing(index_elements=list(keys))
        .returning(table.c.id)
    ))
    return len(session.execute(stmt, [dict(r) for r in rows]).all())


def existing_measurements(
    session: Session | Connection, keys: Iterable[tuple[str, str, dt.datetime]]
) -> set[tuple[str, str, dt.datetime]]:
    """Which of the (machine, point, ts) keys are already stored, in one query."""
    want = set(keys)
    if not want:
        return set()
    t = Measurement.__table__.c
    stmt = cached_statement(("existing_measurements",), lambda: select(t.machine_id, t.point_id, t.ts).where(
        t.ts.in_(bindparam("ts", expanding=True)), t.machine_id.in_(bindparam("machines", expanding=True))))
    rows = session.execute(
        stmt, {"ts": sorted({k[2] for k in want}), "machines": sorted({k[0] for k in want})}
    ).all()
    return {(m, p, t) for m, p, t in rows} & want


def existing_speed_readings(
    session: Session | Connection, keys: Iterable[tuple[str, dt.datetime]]
) -> set[tuple[str, dt.datetime]]:
    """Which of the (machine, ts) speed-reading keys are already stored, in one query."""
    want = set(keys)
    if not want:
        return set()
    t = SpeedReadingRow.__table__.c
    stmt = cached_statement(("existing_speed_readings",), lambda: select(t.machine_id, t.ts).where(
        t.ts.in_(bindparam("ts", expanding=True)), t.machine_id.in_(bindparam("machines", expanding=True))))
    rows = session.execute(
        stmt, {"ts": sorted({k[1] for k in want}), "machines": sorted({k[0] for k in want})}
    ).all()
    return {(m, t) for m, t in rows} & want


def snapshot_times(
    session: Session | Connection, points: Iterable[tuple[str, str]], since: dt.datetime, until: dt.datetime,
    *, waveforms: bool = False,
) -> dict[tuple[str, str], list[dt.datetime]]:
    """Instants of the spectrum (``waveforms``: raw waveform) snapshots kept per (machine,
    point) in ``(since, until]``, in one query (monitor/service/cadence.py)."""
    pairs = set(points)
    out: dict[tuple[str, str], list[dt.datetime]] = {p: [] for p in pairs}
    if not pairs:
        return out
    t = (WaveformSnapshot if waveforms else SpectrumSnapshot).__table__.c
    stmt = cached_statement(("snapshot_times", waveforms), lambda: select(t.machine_id, t.point_id, t.ts).where(
        t.machine_id.in_(bindparam("machines", expanding=True)),
        t.ts > bindparam("since", type_=t.ts.type),
        t.ts <= bindparam("until", type_=t.ts.type),
    ).distinct())
    rows = session.execute(
        stmt, {"machines": sorted({p[0] for p in pairs}), "since": since, "until": until}
    ).all()
    for m, p, t in rows:
        if (m, p) in out:
            out[(m, p)].append(t)
    return out


def speed_reading_values(reading: SpeedReading) -> dict[str, Any]:
    """The ``speed_readings`` row of one speed reading."""
    return {"machine_id": reading.machine, "ts": to_datetime(reading.ts), "speed_hz": float(reading.speed_hz)}


# ----------------------------------------------------------------------------- alarms


@dataclass(frozen=True)
class _Step:
    machine: str
    point: str | None
    kind: str
    subject: str
    severity: str
    state: str
    name: str
    at: dt.datetime
    evidence: Any
    user: str | None
    comment: str | None
    ref: str | None


def _step(t: Transition) -> _Step:
    """What the store needs of a detector's transition (its alarm's state after it)."""
    alarm = t.alarm
    ref = alarm.get("id")
    return _Step(
        machine=str(alarm["machine"]),
        point=alarm.get("point"),
        kind=str(alarm["kind"]),
        subject=str(alarm.get("subject") or ""),
        severity=str(t.severity),
        state=str(alarm["state"]),
        name=str(t.name),
        at=to_datetime(t.ts),
        evidence=t.evidence,
        user=t.user,
        comment=t.comment,
        ref=None if ref is None else str(ref),
    )


def _key_filter(t: _Step) -> Any:
    point = Alarm.point_id.is_(None) if t.point is None else Alarm.point_id == t.point
    return and_(
        Alarm.machine_id == t.machine, point, Alarm.kind == t.kind, Alarm.subject == t.subject
    )


def record_transitions(
    session: Session,
    transitions: Iterable[Transition],
    *,
    spectrum_snapshot_id: int | None = None,
    spectra: Sequence[Mapping[str, Any]] = (),
    hints: Sequence[Mapping[str, Any]] | None = None,
) -> list[int]:
    """Apply the detectors' alarm transitions to the ``alarms`` rows and append them to
    ``alarm_transitions``, inside the caller's transaction.

    ``spectrum_snapshot_id`` (the velocity spectrum kept as evidence) goes into each
    transition's row and evidence, ``spectra`` (every spectrum kept or referred to: ``point``,
    ``kind``, ``spectrum_id``, ``ts``, ``age_s``) into its evidence (docs/alarms.md, "Evidence
    spectra"), ``hints`` into that of growth transitions (docs/diagnosis.md).

    An alarm is identified by (machine, point, kind, subject); a transition opens a new alarm row when none of that identity is open
    (state not ``cleared``). A transition already stored (same alarm identity, name and
    instant) is skipped, so replays are no-ops. A transition at a time the alarm is shelved
    is flagged ``shelved`` (monitor/store/shelving.py). Returns the alarm ids touched, in order.
    """
    ids: list[int] = []
    for raw in transitions:
        t = _step(raw)
        seen = session.execute(
            select(AlarmTransitionRow.alarm_id)
            .join(Alarm, Alarm.id == AlarmTransitionRow.alarm_id)
            .where(
                _key_filter(t),
                AlarmTransitionRow.transition == t.name,
                AlarmTransitionRow.at == t.at,
            )
            .limit(1)
        ).scalar_one_or_none()
        if seen is not None:
            ids.append(seen)
            continue
        alarm = session.execute(
            select(Alarm)
            .where(_key_filter(t), Alarm.state.not_in(CLOSED_STATES))
            .order_by(Alarm.id.desc())
            .limit(1)
        ).scalar_one_or_none()
        evidence = jsonable(t.evidence) if t.evidence is not None else None
        if isinstance(evidence, dict) and spectrum_snapshot_id is not None:
            evidence["spectrum_snapshot_id"] = spectrum_snapshot_id
        if isinstance(evidence, dict) and spectra:
            evidence["spectra"] = [dict(x) for x in spectra]
        if isinstance(evidence, dict) and hints is not None and t.kind == "amplitude_growth":
            evidence["hints"] = [dict(x) for x in hints]
        if alarm is None:
            previous = session.scalars(select(Alarm).where(_key_filter(t)).order_by(Alarm.id.desc()).limit(1)).first()
            alarm = Alarm(
                ref=t.ref,
                machine_id=t.machine,
                point_id=t.point,
                kind=t.kind,
                subject=t.subject,
                severity=t.severity,
                state=t.state,
                raised_at=t.at,
                last_transition=t.name,
                last_transition_at=t.at,
            )
            session.add(alarm)
            inherit_shelf(session, alarm, previous, t.at)
        alarm.severity = t.severity
        alarm.state = t.state
        alarm.last_transition = t.name
        alarm.last_transition_at = t.at
        if t.ref is not None:
            alarm.ref = t.ref
        if evidence is not None and t.name != "acknowledged":
            alarm.evidence = evidence
        if t.state in CLOSED_STATES:
            alarm.cleared_at = t.at
        if t.name == "acknowledged":
            alarm.acknowledged_by = t.user
            alarm.acknowledged_at = t.at
            alarm.ack_comment = t.comment
        session.flush()
        session.add(
            AlarmTransitionRow(
                alarm_id=alarm.id,
                transition=t.name,
                severity=t.severity,
                state=t.state,
                at=t.at,
                evidence=evidence,
                spectrum_snapshot_id=spectrum_snapshot_id,
                user=t.user,
                shelved=is_suppressed(alarm, t.at),
            )
        )
        session.flush()
        ids.append(alarm.id)
    return ids


def acknowledge_alarm(
    session: Session,
    alarm_id: int,
    user: str,
    comment: str | None = None,
    *,
    at: dt.datetime | None = None,
) -> Alarm:
    """Record that ``user`` acknowledged alarm ``alarm_id`` (a transition
    ``acknowledged``); the state becomes ``acknowledged`` unless the alarm is cleared.
    Raises LookupError when there is no such alarm."""
    alarm = session.get(Alarm, alarm_id)
    if alarm is None:
        raise LookupError(f"no alarm with id {alarm_id}.")
    when = at or utcnow()
    alarm.acknowledged_by = user
    alarm.acknowledged_at = when
    alarm.ack_comment = comment
    if alarm.state not in CLOSED_STATES:
        alarm.state = "acknowledged"
    alarm.last_transition = "acknowledged"
    alarm.last_transition_at = when
    session.add(
        AlarmTransitionRow(
            alarm_id=alarm.id,
            transition="acknowledged",
            severity=alarm.severity,
            state=alarm.state,
            at=when,
            evidence={"comment": comment} if comment else None,
            user=user,
        )
    )
    session.flush()
    return alarm


# ----------------------------------------------------------------------------- service state


def save_detector_states(
    session: Session | Connection, states: Mapping[str, tuple[Mapping[str, Any], dt.datetime | float | None]]
) -> None:
    """Upsert the detector state JSON of several machines (``{machine: (state, ts)}``) with
    one statement (one parameter set per machine), inside the caller's transaction.
    Each state is exact JSON data (:func:`monitor.detection.evaluator.stored_state`: non-finite
    floats already tagged, :mod:`monitor.detection.state_json`); the serialiser's null for a
    NaN would lose it."""
    if not states:
        return
    dialect = dialect_name(session)
    ins_mod = postgresql if dialect == "postgresql" else sqlite
    table = DetectorState.__table__

    def build() -> Any:
        stmt = ins_mod.insert(table)
        return stmt.on_conflict_do_update(
            index_elements=["machine_id"],
            set_={"state": stmt.excluded.state, "ts": stmt.excluded.ts, "updated_at": stmt.excluded.updated_at},
        )

    now = utcnow()
    session.execute(cached_statement(("save_detector_states", dialect), build), [
        # Written as given: the snapshot holds no NaN or infinity for the serialiser
        # (store/db.py dumps_json) to turn into null.
        {"machine_id": machine, "state": state,
         "ts": to_datetime(ts) if ts is not None else None, "updated_at": now}
        for machine, (state, ts) in sorted(states.items())
    ])


def add_dead_letter(session: Session, *, topic: str, reason: str, detail: str = "", payload: bytes = b"",
                    at: dt.datetime | None = None) -> int:
    """Record a rejected message: its topic, the counted reason, a one-line detail and
    the first 256 bytes of the payload."""
    row = DeadLetter(
        at=at or utcnow(),
        topic=topic[:512],
        reason=reason[:64],
        detail=detail,
        payload_head=bytes(payload[:DEAD_LETTER_HEAD_BYTES]),
        payload_size=len(payload),
    )
    session.add(row)
    session.flush()
    return row.id
