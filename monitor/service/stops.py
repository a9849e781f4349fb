"""Running / stopped in the service: the stops engineers announced (monitor/store/machine_stops.py)
handed to the detectors, and the ``running`` part of each machine's retained status.

The detectors judge running or stopped themselves (monitor/detection/running.py); what
they cannot see is an announcement in the store, read here in the transaction that uses
it (one query for the machines concerned).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from monitor.detection.evaluator import MachineEvaluator
from monitor.detection.running import set_announced
from monitor.model.timefmt import iso_utc
from monitor.store.machine_stops import announced_stops


def apply_announced_stops(db: Any, evaluators: Mapping[str, MachineEvaluator], after: float) -> None:
    """Give each detector of ``evaluators`` the stops announced for its machine that are
    not over at ``after`` (epoch s: the earliest time the caller will judge)."""
    if not evaluators:
        return
    stops = announced_stops(db, evaluators.keys(), after)
    for machine, ev in evaluators.items():
        set_announced(ev.running, stops.get(machine, ()))


def running_status(ev: MachineEvaluator, at: float | None) -> dict[str, Any]:
    """``running`` of the retained status (docs/mqtt.md): ``state`` ('running',
    'stopped', or None before the first judgement), ``at`` (the latest judgement's time),
    ``reason`` (why stopped) and ``announced_until`` (the end of a stop announced at
    ``at``, the machine's newest data time, epoch s)."""
    r = ev.running.status_json(at)
    return {"state": r["state"], "at": iso_utc(r["at"]), "reason": r["reason"],
            "announced_until": iso_utc(r["announced_until"])}
