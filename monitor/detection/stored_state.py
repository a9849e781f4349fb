"""The detector state of one machine as the store keeps it (``detector_state.state``,
docs/store.md): written after each batch, read back after a restart or by another
process, and closed when the machine leaves the registry.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from monitor.detection.alarms import AlarmEngine, AlarmKey, Transition
from monitor.detection.evaluator import MACHINE_RETIRED, MachineEvaluator
from monitor.detection.state_json import upgrade_snapshot
from monitor.model.registry import Machine


def evaluator_from_state(machine: Machine, state: Any) -> tuple[MachineEvaluator, int]:
    """The evaluator of ``machine`` and its version from a stored detector state
    (:func:`stored_state`), or a fresh evaluator at version 0 when nothing usable is
    stored."""
    if isinstance(state, dict) and "evaluator" in state:
        return MachineEvaluator.restore(machine, state["evaluator"]), int(state.get("version") or 0)
    return MachineEvaluator(machine), 0


def retire_state(state: Any, ts: float) -> tuple[dict[str, Any], list[Transition]]:
    """The stored detector state (:func:`stored_state`) of a machine retired from the
    registry, and the transitions that closed its alarms: every live alarm is cleared at
    ``ts`` (epoch s), evidence reason :data:`MACHINE_RETIRED`, in key order. The rest of
    the state is kept as it was (should the machine come back, its baselines and trends
    are there); the version moves on by one and ``retired`` marks the retirement as done,
    so it is done once."""
    if not (isinstance(state, Mapping) and isinstance(state.get("evaluator"), Mapping)):
        return {"version": 1, "retired": True}, []
    snap = upgrade_snapshot(state["evaluator"])
    engine = AlarmEngine.restore(dict(snap["engine"]))
    machine = snap.get("machine")
    out: list[Transition] = []
    for key in sorted(engine.alarm_keys(), key=AlarmKey.text):
        out += engine.end(key, float(ts), {
            "reason": MACHINE_RETIRED,
            "message": f"machine {machine!r} is no longer in the registry; nothing evaluates this alarm any more"})
    return {"version": int(state.get("version") or 0) + 1, "retired": True,
            "evaluator": dict(snap, engine=engine.snapshot())}, out


def stored_state(evaluator: MachineEvaluator, version: int) -> dict[str, Any]:
    """The detector state of one machine as stored (``detector_state.state``): its
    ``version`` (moved on by one at each write, so a process holding an older copy knows
    to reload) and the evaluator's snapshot."""
    return {"version": version, "evaluator": evaluator.snapshot()}
