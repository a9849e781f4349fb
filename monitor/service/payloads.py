"""The bodies the service publishes: each machine's retained status and the alarm events
(docs/mqtt.md).

The status is built from a :class:`MachineView` (the latest facts of the machine seen in
its readings) and the machine's detector (its active alarms); the views of all machines
are kept on a :class:`StatusBoard`. An alarm event is the alarm as the REST API shows it,
in its state after the transition, with the transition's own fields added.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy.orm import Session

from monitor.detection.alarms import Transition, severity_rank
from monitor.detection.evaluator import MachineEvaluator
from monitor.detection.margins import MarginRow
from monitor.detection.results import ReadingEvaluation
from monitor.model.timefmt import iso_utc
from monitor.store import reads


@dataclass
class MachineView:
    """Latest facts of one machine for its retained status.

    The running speed is the newest of the speed messages and the readings sensor health
    accepted (the speed message on a tie), as the detector uses them: so the status stays
    current from the speed stream while a vibration sensor is faulted or absent."""

    ts: float | None = None
    speed_hz: float | None = None
    speed_source: str | None = None
    zones: dict[str, str | None] = field(default_factory=dict)
    nearest: dict[str, Any] | None = None
    #: Evaluations since the status was last built, oldest first: the nearest margin is
    #: taken from the newest that has one when the status is built (once per batch),
    #: not computed for every reading.
    unseen: list[ReadingEvaluation] = field(default_factory=list)
    #: When ``speed_hz`` was measured, epoch s.
    speed_ts: float | None = None
    #: The speed came from a speed message since the status was last built: the nearest
    #: margin is computed at it.
    speed_due: bool = False

    def copy(self) -> MachineView:
        return MachineView(self.ts, self.speed_hz, self.speed_source, dict(self.zones), self.nearest,
                           list(self.unseen), self.speed_ts, self.speed_due)

    def nearest_margin(self, ev: MachineEvaluator) -> dict[str, Any] | None:
        if self.speed_due and self.speed_hz is not None:
            # The tightest pair at the speed, as ReadingEvaluation.nearest_margin chooses it
            # (none while the machine stands).
            rows = ev.margins_at(self.speed_hz) if self.speed_hz > 0 else ()
            row = min(rows, key=lambda r: r.margin_pct - r.required_pct, default=None)
            self.nearest = None if row is None else _nearest_json(row)
        else:
            for evaluation in reversed(self.unseen):
                m = evaluation.nearest_margin()
                if m is not None:
                    self.nearest = _nearest_json(m)
                    break
        self.unseen.clear()
        self.speed_due = False
        return self.nearest


def _nearest_json(m: MarginRow) -> dict[str, Any]:
    return {"subject": m.subject, "margin_pct": m.margin_pct, "required_pct": m.required_pct, "status": m.status}


class StatusBoard:
    """The status views of the machines this process monitors."""

    def __init__(self, machines: Iterable[str]) -> None:
        self._views: dict[str, MachineView] = {m: MachineView() for m in machines}

    def saw_waveform(self, machine: str, evaluation: ReadingEvaluation) -> None:
        """A waveform of ``machine`` was evaluated: its time, zone, and its speed when
        sensor health accepted the reading and no newer speed is known."""
        view = self._views[machine]
        view.ts = max(view.ts or 0.0, evaluation.ts)
        view.zones[evaluation.point] = evaluation.zone
        if evaluation.speed_hz is not None and evaluation.health.ok and (
                view.speed_ts is None or evaluation.ts > view.speed_ts):
            view.speed_hz, view.speed_ts, view.speed_source = evaluation.speed_hz, evaluation.ts, "reading"
            view.speed_due = False
            view.unseen.append(evaluation)

    def saw_speed(self, machine: str, ts: float, speed_hz: float) -> None:
        """A speed reading of ``machine`` (epoch s, Hz) was observed."""
        view = self._views[machine]
        view.ts = max(view.ts or 0.0, ts)
        if view.speed_ts is None or ts >= view.speed_ts:
            view.speed_hz, view.speed_ts, view.speed_source = speed_hz, ts, reads.SPEED_TOPIC
            view.speed_due = True
            view.unseen.clear()

    def status(self, machine: str, ev: MachineEvaluator) -> dict[str, Any]:
        """The retained status body of ``machine`` (docs/mqtt.md)."""
        view = self._views[machine]
        active = ev.engine.active()
        worst = max((a.severity for a in active), key=severity_rank, default=None)
        zones = [z for z in view.zones.values() if z]
        return {
            "machine": machine,
            "ts": iso_utc(view.ts),
            "state": worst or "normal",
            "speed_hz": view.speed_hz,
            "nearest_margin": view.nearest_margin(ev),
            "zone": max(zones) if zones else None,
            "zones": dict(view.zones),
            "active_alarms": [
                {"ref": a.id, "point": a.key.point, "kind": a.key.kind, "subject": a.key.subject,
                 "severity": a.severity, "state": a.state}
                for a in active
            ],
        }

    def copies(self, machines: Iterable[str]) -> dict[str, MachineView]:
        """Copies of the views of ``machines``, to put back after a failed run."""
        return {m: v.copy() for m in machines if (v := self._views.get(m)) is not None}

    def restore(self, copies: dict[str, MachineView]) -> None:
        """Put back views copied before a run that was never committed."""
        self._views.update(copies)

    def ensure(self, machine: str) -> None:
        """A view for a machine new to the registry."""
        self._views.setdefault(machine, MachineView())

    def drop(self, machine: str) -> None:
        """A retired machine has no status."""
        self._views.pop(machine, None)

    def keep_points(self, machine: str, points: Iterable[str]) -> None:
        """Only ``points`` remain of ``machine``: a retired point's zone leaves the status."""
        view = self._views.get(machine)
        if view is not None:
            kept = set(points)
            view.zones = {p: z for p, z in view.zones.items() if p in kept}


def alarm_events(session: Session, trans: Sequence[Transition], ids: Sequence[int],
                 outside: Sequence[Transition]) -> list[dict[str, Any]]:
    """Alarm events (REST alarm JSON with its current state, plus the transition): first
    those made outside the readings and recorded already (``outside``: alarms closed by a
    registry change, acknowledgements), which came before the readings' own (``trans``,
    recorded as alarms ``ids``)."""
    out: list[dict[str, Any]] = []
    for t in outside:
        row = reads.newest_alarm_with_ref(session, t.alarm_id)
        body = reads.alarm_json(row) if row is not None else dict(t.alarm)
        body.update(transition_fields(t))
        out.append(body)
    rows = reads.alarms_by_id(session, ids)
    for t, aid in zip(trans, ids, strict=False):
        row = rows.get(aid)
        body = reads.alarm_json(row) if row is not None else dict(t.alarm)
        body.update(transition_fields(t))
        out.append(body)
    return out


def transition_fields(t: Transition) -> dict[str, Any]:
    """The fields an alarm event adds to the alarm: what happened, when, and to which."""
    return {
        "transition": t.name,
        "transition_at": iso_utc(t.ts),
        "previous_severity": t.previous_severity,
        "reading_id": t.reading_id,
        "ref": t.alarm_id,
    }
