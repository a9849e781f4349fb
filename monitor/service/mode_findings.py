"""Mode-shift findings of an impact test or a run-up/coast-down, recorded as alarms.

The running service keeps each machine's detector state (its alarms among it) in the
``detector_state`` table with a version it checks at every batch. Recording a finding
therefore goes through that state: in one transaction the machine's state row is locked,
its evaluator restored, the findings applied
(:meth:`monitor.detection.evaluator.MachineEvaluator.observe_mode_findings`), the transitions
appended to the alarm history and the state written back with its version moved on. The
service sees the new version at its next batch and reloads the machine, mode-shift alarms
included; the dashboard shows them like any other alarm.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from sqlalchemy import select

from monitor.detection.alarms import Transition
from monitor.detection.stored_state import evaluator_from_state, stored_state
from monitor.model.registry import Machine
from monitor.modes.shift import ModeShift
from monitor.service.payloads import alarm_events
from monitor.store import Store
from monitor.store.models import DetectorState
from monitor.store.writes import record_transitions, save_detector_states


def record_mode_findings(
    store: Store,
    machine: Machine,
    findings: Sequence[ModeShift],
    ts: float,
    *,
    point: str | None = None,
    evidence: Mapping[str, Any] | None = None,
) -> list[dict[str, Any]]:
    """Apply ``findings`` of a test at ``ts`` (epoch s) to ``machine``'s stored detector
    state and store the alarm transitions they cause; returns them as alarm events, the
    shape published on MQTT (docs/schemas/alarm-event.json; often none: a mode still
    within its tolerance with no alarm open changes nothing)."""
    with store.write_transaction() as s:
        stmt = select(DetectorState.state, DetectorState.ts).where(DetectorState.machine_id == machine.id)
        if s.get_bind().dialect.name == "postgresql":
            stmt = stmt.with_for_update()
        row = s.execute(stmt).one_or_none()
        evaluator, version = evaluator_from_state(machine, row.state if row is not None else None)
        transitions: list[Transition] = evaluator.observe_mode_findings(findings, ts, point=point,
                                                                        evidence=evidence)
        if not transitions:
            return []
        ids = record_transitions(s, transitions)
        save_detector_states(s, {machine.id: (stored_state(evaluator, version + 1),
                                              row.ts if row is not None else None)})
        return alarm_events(s, transitions, ids, [])
