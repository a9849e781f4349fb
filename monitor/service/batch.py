"""One transaction for a batch of messages, as a sequence of named steps.

:func:`commit_batch` runs, inside one write transaction and in this order:

1. :func:`write_dead_letters`: each rejected message kept with its reason;
2. :func:`split_stored`: readings stored already (a redelivery) or repeated within the
   batch are set apart, in one query per table (a redelivery is never fed to the detector
   twice);
3. ``DetectorStates.take``: the detector states of the machines touched, locked and
   brought up to date (monitor/service/states.py), with the changes made outside the
   readings (registry closings, acknowledgements);
4. :func:`evaluate`: each new reading through its machine's detector, in arrival order
   (one of equipment out of service for the record only: monitor/service/suppression.py);
   :func:`track_passages`: each through its machine's passage trackers, the mode-shift
   alarms of the passages found (monitor/service/passages.py);
   :func:`clear_processing_faults` for the streams processed again;
5. :func:`build_rows` and :func:`insert_rows`: measurements, speed readings, spectra and
   raw waveforms (on their cadences; a waveform with alarm transitions keeps its own) in multi-row ``INSERT ... ON CONFLICT DO NOTHING`` (one row per reading, built by the
   store's own row builders), and the passages found;
6. :func:`record_alarms`: alarm transitions in arrival order, each with its evidence
   spectra (monitor/service/evidence.py); the alarm events to publish;
7. ``DetectorStates.save``: each machine's detector state (and passage trackers') written once;
8. :func:`attach_statuses`: one retained status per machine touched, stored for the
   overview (``machine_status``).

A crash at any instant leaves either nothing or everything of a batch committed. A reading
another process stored between step 2 and step 5 makes the insert come back short
(:class:`ReadingRaced`): the batch runs again with every reading checked.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, cast

from sqlalchemy import Connection, Table
from sqlalchemy.orm import Session

from monitor.analysis.waveform import ReadingAnalysis
from monitor.detection.alarms import Transition
from monitor.detection.evaluator import MachineEvaluator
from monitor.detection.results import ReadingEvaluation
from monitor.service import evidence
from monitor.service.cadence import Kept, SnapshotCadence
from monitor.service.core import Core
from monitor.service.failures import ReadingRaced
from monitor.service.faults import processing_resumed
from monitor.service.items import (
    Decoded,
    Item,
    Outcome,
    OutcomeKind,
    RejectedMessage,
    SpeedMessage,
    WaveformMessage,
)
from monitor.service.passages import FoundPassage, feed_reading
from monitor.service.payloads import StatusBoard, alarm_events, retained_statuses
from monitor.service.states import DetectorStates
from monitor.service.stops import apply_announced_stops
from monitor.service.suppression import NONE as NO_WORK
from monitor.service.suppression import PlannedWork, planned_work
from monitor.store import add_dead_letter, record_transitions
from monitor.store.models import (
    Measurement,
    PassageRow,
    SpectrumSnapshot,
    SpeedReadingRow,
    WaveformSnapshot,
    utcnow,
)
from monitor.store.passage_writes import passage_values
from monitor.store.writes import (
    SNAPSHOT_KEY,
    existing_measurements,
    existing_speed_readings,
    insert_many_ignore,
    measurement_values,
    snapshot_rows,
    speed_reading_values,
    to_datetime,
    waveform_row,
)

# The ORM types a model's __table__ as any FromClause; these are its Tables.
MEASUREMENTS = cast(Table, Measurement.__table__)
SPEED_READINGS = cast(Table, SpeedReadingRow.__table__)
SNAPSHOTS = cast(Table, SpectrumSnapshot.__table__)
MEASUREMENT_KEY = ("machine_id", "point_id", "ts")
SPEED_READING_KEY = ("machine_id", "ts")
PASSAGES = cast(Table, PassageRow.__table__)
PASSAGE_KEY = ("machine_id", "point_id", "started_at", "seq")
WAVEFORMS = cast(Table, WaveformSnapshot.__table__)
WAVEFORM_KEY = ("machine_id", "point_id", "ts")


@dataclass(eq=False)
class Evaluated:
    """A new reading after its detector saw it: the evaluation (waveforms) and the alarm
    transitions it carries (the evaluation's own, then any ``processing_fault`` clearing)."""

    item: Decoded
    evaluation: ReadingEvaluation | None
    transitions: list[Transition]
    out_of_service: bool = False


@dataclass
class BatchRows:
    """The rows a batch inserts, in arrival order."""

    measurements: list[dict[str, Any]] = field(default_factory=list)
    speed_readings: list[dict[str, Any]] = field(default_factory=list)
    snapshots: list[dict[str, Any]] = field(default_factory=list)
    waveforms: list[dict[str, Any]] = field(default_factory=list)


def commit_batch(core: Core, items: Sequence[Item], *, check_all: bool = True) -> list[Outcome]:
    """Commit ``items`` in one transaction; returns one outcome per item, in order (a
    machine's status rides on the last of its outcomes that has one).

    The store is asked which readings it holds already when ``check_all`` or any reading
    needs it (``check``); otherwise every reading is taken as new and a short insert
    raises :class:`ReadingRaced`."""
    outcomes: dict[Item, Outcome] = {}
    decoded = [it for it in items if not isinstance(it, RejectedMessage)]
    touched: dict[str, float] = {}
    kept: Kept = {}
    waves_kept: Kept = {}
    analysed: list[ReadingAnalysis] = []
    with core.transaction() as s:
        # Core statements run on the session's connection (same transaction): the ORM
        # Session's execute adds about as much per statement as SQLite takes.
        c = s.connection()
        outcomes.update(write_dead_letters(s, [it for it in items if isinstance(it, RejectedMessage)]))
        fresh, repeats = split_stored(c, decoded, check=check_all or any(it.check for it in decoded))
        outcomes.update({it: Outcome(OutcomeKind.DUPLICATE, machine=it.machine) for it in repeats})
        if fresh:
            touched = latest_per_machine(fresh)
            taken = core.states.take(s, sorted(touched))
            work = planned_work(s, touched, core.clock())
            apply_announced_stops(c, taken.evaluators, min(it.reading.ts for it in fresh))
            waves = [it for it in fresh if isinstance(it, WaveformMessage) and it.analysis is not None]
            kept = core.cadence.kept(c, waves)
            waves_kept = core.waveform_cadence.kept(c, waves)
            evaluated = evaluate(fresh, taken.evaluators, core.board, work)
            found = track_passages(evaluated, taken.evaluators, core.states)
            clear_processing_faults(evaluated, taken.evaluators)
            rows = build_rows(evaluated, kept, core.cadence)
            rows.waveforms = waveform_rows(evaluated, waves_kept, core.waveform_cadence)
            insert_rows(c, rows)
            insert_passages(c, found)
            analysed = [it.analysis for it in fresh if isinstance(it, WaveformMessage) and it.analysis is not None]
            outcomes.update(record_alarms(s, evaluated, taken.outside, core.latest, analysed, taken.evaluators))
            core.states.save(c, touched)
            attach_statuses(c, evaluated, outcomes, taken.evaluators, core.board)
    core.states.saved(touched)
    core.cadence.remember(kept)
    core.waveform_cadence.remember(waves_kept)
    with core.lock:  # the registry follower (periodic thread) drops retired points' spectra
        core.latest.remember(analysed)
    return [outcomes[it] for it in items]


def write_dead_letters(s: Session, rejected: Sequence[RejectedMessage]) -> dict[Item, Outcome]:
    """Keep each rejected message as a dead letter with its reason and detail."""
    for it in rejected:
        add_dead_letter(s, topic=it.topic, reason=it.rejection.reason, detail=it.rejection.detail,
                        payload=it.payload)
    return {it: Outcome(OutcomeKind.REJECTED, reason=it.rejection.reason) for it in rejected}


def split_stored(conn: Connection, readings: Sequence[Decoded], *, check: bool
                 ) -> tuple[list[Decoded], list[Decoded]]:
    """The readings not stored yet, in order, and the others: stored already or repeated
    within the batch. Without ``check`` the store is not asked (each reading not repeated
    within the batch is taken as new)."""
    have_waves = existing_measurements(conn, [it.store_key() for it in readings
                                              if check and isinstance(it, WaveformMessage)])
    have_speeds = existing_speed_readings(conn, [it.store_key() for it in readings
                                                 if check and isinstance(it, SpeedMessage)])
    fresh: list[Decoded] = []
    repeats: list[Decoded] = []
    for it in readings:
        if isinstance(it, WaveformMessage):
            wkey = it.store_key()
            seen = wkey in have_waves
            have_waves.add(wkey)
        else:
            skey = it.store_key()
            seen = skey in have_speeds
            have_speeds.add(skey)
        (repeats if seen else fresh).append(it)
    return fresh, repeats


def latest_per_machine(readings: Sequence[Decoded]) -> dict[str, float]:
    """The latest reading time of each machine, epoch s (in order of first appearance)."""
    out: dict[str, float] = {}
    for it in readings:
        ts = it.reading.ts
        out[it.machine] = max(ts, out.get(it.machine, ts))
    return out


def evaluate(readings: Sequence[Decoded], evaluators: Mapping[str, MachineEvaluator],
             board: StatusBoard, work: PlannedWork = NO_WORK) -> list[Evaluated]:
    """Each reading through its machine's detector, in arrival order; the status views
    follow. Readings of equipment out of service (``work``) go through
    :func:`evaluate_out_of_service` instead."""
    out: list[Evaluated] = []
    for it in readings:
        ev = evaluators[it.machine]
        if work.covers(it.machine, it.reading.point if isinstance(it, WaveformMessage) else None):
            out.append(evaluate_out_of_service(it, ev, board))
        elif isinstance(it, WaveformMessage):
            evaluation = ev.evaluate(it.analysis, it.reading)
            out.append(Evaluated(it, evaluation, list(evaluation.transitions)))
            board.saw_waveform(it.machine, evaluation,
                               it.analysis.speed_source if it.analysis is not None else "measured")
        else:
            r = it.reading
            # Speed 0 too: it ends the stays in bands and says the machine stopped.
            out.append(Evaluated(it, None, ev.observe_speed(r)))
            board.saw_speed(r.machine, r.ts, r.speed_hz)
    return out


def evaluate_out_of_service(it: Decoded, ev: MachineEvaluator, board: StatusBoard) -> Evaluated:
    """A reading of equipment out of service (monitor/service/suppression.py): a waveform
    is evaluated for the record only (nothing raised, nothing learnt), a speed message is
    shown but advances no resonance alarm."""
    if isinstance(it, WaveformMessage):
        evaluation = ev.evaluate_out_of_service(it.analysis, it.reading)
        board.saw_waveform(it.machine, evaluation,
                           it.analysis.speed_source if it.analysis is not None else "measured")
        return Evaluated(it, evaluation, [], out_of_service=True)
    board.saw_speed(it.machine, it.reading.ts, it.reading.speed_hz)
    return Evaluated(it, None, [], out_of_service=True)


def track_passages(evaluated: Sequence[Evaluated], evaluators: Mapping[str, MachineEvaluator],
                   states: DetectorStates) -> list[FoundPassage]:
    """Each reading through its machine's passage trackers, in arrival order; the passages
    of the sweeps completed, whose mode-shift transitions ride on the reading that
    completed them (monitor/service/passages.py)."""
    out: list[FoundPassage] = []
    for e in evaluated:
        if e.out_of_service:
            continue  # planned work: its sweeps are no evidence of the machine's modes
        machine = e.item.machine
        found, trans = feed_reading(states.passages(machine), evaluators[machine], e.item, e.evaluation)
        out += found
        e.transitions.extend(trans)
    return out


def insert_passages(conn: Connection, found: Sequence[FoundPassage]) -> None:
    """Insert the passages found (one stored already, by a batch that raced, is skipped)."""
    insert_many_ignore(conn, PASSAGES, [passage_values(f.machine, f.point, f.sweep, f.seq, f.detected_at,
                                                       f.shift) for f in found], PASSAGE_KEY)


def clear_processing_faults(evaluated: Sequence[Evaluated], evaluators: Mapping[str, MachineEvaluator]) -> None:
    """Streams with a ``processing_fault`` alarm processed again: the clearing rides on
    the stream's last reading of the batch (monitor/service/faults.py)."""
    for index, trans in processing_resumed(evaluators.values(), [e.item.reading for e in evaluated]):
        evaluated[index].transitions.extend(trans)


def build_rows(evaluated: Sequence[Evaluated], kept: Kept, cadence: SnapshotCadence) -> BatchRows:
    """One measurements row per waveform (its analysis, or the bare waveform when the
    analysis failed: health flags and evaluation still stored, so it is stored exactly
    once), one row per speed reading, and the spectra of waveforms due by the cadence
    (``kept`` records them; a waveform with alarm transitions keeps its spectra as their
    evidence instead, :func:`record_alarms`)."""
    rows = BatchRows()
    # The margin table is kept with the batch's last analysed reading of each machine
    # only: the dashboard reads it from a machine's newest reading (and recomputes it when
    # absent), and building it for every reading is a sizeable share of the per-reading cost.
    with_margins = {e.item.machine: i for i, e in enumerate(evaluated)
                    if isinstance(e.item, WaveformMessage) and e.item.analysis is not None}
    for i, e in enumerate(evaluated):
        it, evaluation = e.item, e.evaluation
        if isinstance(it, SpeedMessage):
            rows.speed_readings.append(speed_reading_values(it.reading))
            continue
        assert evaluation is not None  # every waveform is evaluated
        a = it.analysis
        rows.measurements.append(measurement_values(
            it.reading if a is None else a, zone=None if a is None else evaluation.zone,
            health=evaluation.health,
            evaluation=evaluation.to_json(margins=a is None or with_margins[it.machine] == i)))
        if a is None:
            continue
        if evaluation.transitions:
            # Kept as the transitions' evidence (record_alarms); counts for the cadence.
            kept.setdefault((a.machine, a.point), []).append(to_datetime(a.ts))
        elif cadence.due(kept, a):
            rows.snapshots.extend(snapshot_rows(a))
    return rows


def waveform_rows(evaluated: Sequence[Evaluated], kept: Kept, cadence: SnapshotCadence) -> list[dict[str, Any]]:
    """The raw waveforms kept: each waveform with alarm transitions (their evidence, never
    thinned; also one the analysis could not use, such as a flat line), and each analysed
    waveform due by the waveform cadence (``kept`` records them)."""
    rows: list[dict[str, Any]] = []
    for e in evaluated:
        it = e.item
        if not isinstance(it, WaveformMessage):
            continue
        speed = None if it.analysis is None else it.analysis.speed_hz
        if e.transitions:
            kept.setdefault(it.stream, []).append(to_datetime(it.reading.ts))
            rows.append(waveform_row(it.reading, speed, evidence=True))
        elif it.analysis is not None and cadence.due(kept, it.reading):
            rows.append(waveform_row(it.reading, speed))
    return rows


def insert_rows(conn: Connection, rows: BatchRows) -> None:
    """Insert the batch's rows, skipping any stored already; :class:`ReadingRaced` when a
    reading taken as new was stored meanwhile (the insert came back short)."""
    # Stamped as late as possible: stored_at is what publish-to-commit latency uses.
    stored_at = utcnow()
    for row in rows.measurements:
        row["stored_at"] = stored_at
    new = insert_many_ignore(conn, MEASUREMENTS, rows.measurements, MEASUREMENT_KEY)
    new += insert_many_ignore(conn, SPEED_READINGS, rows.speed_readings, SPEED_READING_KEY)
    if new != len(rows.measurements) + len(rows.speed_readings):
        raise ReadingRaced
    insert_many_ignore(conn, SNAPSHOTS, rows.snapshots, SNAPSHOT_KEY)
    insert_many_ignore(conn, WAVEFORMS, rows.waveforms, WAVEFORM_KEY)


def record_alarms(s: Session, evaluated: Sequence[Evaluated], outside: Mapping[str, list[Transition]],
                  latest: evidence.LatestSpectra, analysed: Sequence[ReadingAnalysis],
                  evaluators: Mapping[str, MachineEvaluator]) -> dict[Item, Outcome]:
    """Record the alarm transitions in arrival order, each with its evidence spectra
    (monitor/service/evidence.py: a waveform's own; for a speed message the machine's
    latest, from ``latest`` and the batch's ``analysed`` readings) and, for a waveform's
    growth transitions, the reading's likely-cause hints; the outcome of each
    reading carries its alarm events, the first reading of a machine also those made
    outside the readings (``outside``)."""
    out: dict[Item, Outcome] = {}
    announced: set[str] = set()
    for e in evaluated:
        it, trans = e.item, e.transitions
        ids: list[int] = []
        if trans:
            hints = None
            if isinstance(it, WaveformMessage):
                kept = evidence.Evidence() if it.analysis is None else evidence.for_reading(s, it.analysis, trans)
                if it.analysis is not None and evidence.moves_growth_alarm(trans):
                    hints = evidence.reading_hints(it.analysis, e.evaluation, evaluators[it.machine].machine)
            else:
                kept = evidence.for_speed(s, it.machine, it.reading.ts,
                                          latest.newest(it.machine, it.reading.ts, analysed))
            ids = record_transitions(s, trans, spectrum_snapshot_id=kept.spectrum_id, spectra=kept.spectra,
                                     hints=hints)
        mine = [] if it.machine in announced else outside.get(it.machine, [])
        announced.add(it.machine)
        kind = OutcomeKind.WAVEFORM if isinstance(it, WaveformMessage) else OutcomeKind.SPEED
        out[it] = Outcome(kind, machine=it.machine,
                          events=alarm_events(s, trans, ids, mine) if trans or mine else [])
    return out


def attach_statuses(conn: Connection, evaluated: Sequence[Evaluated], outcomes: Mapping[Item, Outcome],
                    evaluators: Mapping[str, MachineEvaluator], board: StatusBoard) -> None:
    """The retained status once per machine, stored and put on its last outcome of the
    batch (a speed message's too: the speed and the nearest margin follow the speed
    stream)."""
    last = {e.item.machine: e.item for e in evaluated}
    bodies = retained_statuses(conn, board, {m: evaluators[m] for m in last})
    for machine, item in last.items():
        outcomes[item].status = bodies[machine]
