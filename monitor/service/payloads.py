"""The bodies the service publishes: each machine's retained status and the alarm events
(docs/mqtt.md).

The status is built from a :class:`MachineView` (the latest facts of the machine seen in
its readings) and the machine's detector (its active alarms); the views of all machines
are kept on a :class:`StatusBoard`. Each status built is also stored, in the transaction
that built it (:func:`retained_statuses`; the overview reads it). An alarm event is the alarm as the REST API shows it,
in its state after the transition, with the transition's own fields added.
"""

from __future__ import annotations

import datetime as dt
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import Connection
from sqlalchemy.orm import Session

from monitor.detection.alarms import Transition, severity_rank
from monitor.detection.evaluator import MachineEvaluator
from monitor.detection.margins import MarginRow
from monitor.detection.results import ReadingEvaluation
from monitor.model.timefmt import iso_utc, parse_iso_utc
from monitor.service.stops import running_status
from monitor.store import reads
from monitor.store.statuses import save_statuses


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
    #: Each point's overall velocity level of its newest reading, mm/s RMS.
    overall: dict[str, float | None] = field(default_factory=dict)

    def copy(self) -> MachineView:
        return MachineView(self.ts, self.speed_hz, self.speed_source, dict(self.zones), self.nearest,
                           list(self.unseen), self.speed_ts, self.speed_due, dict(self.overall))

    @classmethod
    def from_status(cls, body: dict[str, Any]) -> MachineView:
        """The view a stored status body was built from (a restarted service carries on
        from the status it last published, not from an empty one)."""
        def epoch(text: Any) -> float | None:
            return parse_iso_utc(text).timestamp() if isinstance(text, str) else None

        return cls(ts=epoch(body.get("ts")), speed_hz=body.get("speed_hz"), speed_source=body.get("speed_source"),
                   zones=dict(body.get("zones") or {}), nearest=body.get("nearest_margin"),
                   speed_ts=epoch(body.get("speed_at")), overall=dict(body.get("overall_mm_s_rms") or {}))

    def worst_zone(self) -> dict[str, Any] | None:
        """The point in the worst ISO 20816 zone (the higher overall level on a tie):
        ``{"point", "zone", "overall_mm_s_rms"}``, or None while no point has a zone."""
        zoned = [(z, self.overall.get(p) or 0.0, p) for p, z in self.zones.items() if z in ZONES]
        if not zoned:
            return None
        z, _, p = max(zoned)
        return {"point": p, "zone": z, "overall_mm_s_rms": self.overall.get(p)}

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
    return {"subject": m.subject, "margin_pct": m.margin_pct, "required_pct": m.required_pct, "status": m.status,
            "mode": m.mode, "mode_hz": m.mode_hz, "excitation": m.excitation, "order": m.order,
            "excitation_hz": m.excitation_hz}


#: The ISO 20816 evaluation zones, best to worst.
ZONES = ("A", "B", "C", "D")


class StatusBoard:
    """The status views of the machines this process monitors; ``clock`` (epoch s, the
    service's) dates what is out of service in a status."""

    def __init__(self, machines: Iterable[str], clock: Callable[[], float] = time.time) -> None:
        self._views: dict[str, MachineView] = {m: MachineView() for m in machines}
        self.clock = clock

    def saw_waveform(self, machine: str, evaluation: ReadingEvaluation, speed_source: str = "measured") -> None:
        """A waveform of ``machine`` was evaluated: its time, zone and overall level, and its
        speed (``speed_source``: 'measured' or 'estimated', as the reading's analysis says)
        when sensor health accepted the reading and no newer speed is known."""
        view = self._views[machine]
        view.ts = max(view.ts or 0.0, evaluation.ts)
        view.zones[evaluation.point] = evaluation.zone
        view.overall[evaluation.point] = evaluation.overall_velocity_mm_s_rms
        if evaluation.speed_hz is not None and evaluation.health.ok and (
                view.speed_ts is None or evaluation.ts > view.speed_ts):
            view.speed_hz, view.speed_ts, view.speed_source = evaluation.speed_hz, evaluation.ts, speed_source
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
            "overall_mm_s_rms": dict(view.overall),
            "worst_zone": view.worst_zone(),
            "speed_source": view.speed_source,
            "speed_at": iso_utc(view.speed_ts),
            "running": running_status(ev, view.ts),
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
            view.overall = {p: v for p, v in view.overall.items() if p in kept}

    def load(self, bodies: Iterable[dict[str, Any]]) -> None:
        """Views rebuilt from the stored status bodies of machines this process monitors."""
        for body in bodies:
            if body.get("machine") in self._views:
                self._views[body["machine"]] = MachineView.from_status(body)


def retained_statuses(db: Session | Connection, board: StatusBoard,
                      evaluators: Mapping[str, MachineEvaluator]) -> dict[str, dict[str, Any]]:
    """The retained status of each machine of ``evaluators``, built from its view and
    detector and stored (``machine_status``, for the overview) in the caller's
    transaction, so the stored status is always the one published after the commit."""
    bodies = {m: board.status(m, ev) for m, ev in evaluators.items()}
    mark_out_of_service(db, bodies, board.clock())
    save_statuses(db, bodies.values())
    return bodies


def mark_out_of_service(db: Session | Connection, bodies: Mapping[str, dict[str, Any]], now_s: float) -> None:
    """Add to each status whether its machine is out of service at ``now_s`` (epoch s;
    ``out_of_service``) and which of its points are (``out_of_service_points``;
    docs/alarms.md, "Shelving and out of service")."""
    marks = reads.out_of_service_marks(db, dt.datetime.fromtimestamp(now_s, dt.UTC), bodies)
    for machine, body in bodies.items():
        mine = marks.get(machine, [])
        body["out_of_service"] = None in mine
        body["out_of_service_points"] = [p for p in mine if p is not None]


def alarm_events(session: Session, trans: Sequence[Transition], ids: Sequence[int],
                 outside: Sequence[Transition]) -> list[dict[str, Any]]:
    """Alarm events (REST alarm JSON with its current state, plus the transition): first
    those made outside the readings and recorded already (``outside``: alarms closed by a
    registry change, acknowledgements), which came before the readings' own (``trans``,
    recorded as alarms ``ids``). An event of an alarm shelved at the transition's time
    carries ``shelved`` true: nothing is sent for it (monitor/store/shelving.py)."""
    out: list[dict[str, Any]] = []
    for t in outside:
        row = reads.newest_alarm_with_ref(session, t.alarm_id)
        body = reads.alarm_json(row, now=_at(t)) if row is not None else dict(t.alarm)
        body.update(transition_fields(t))
        out.append(body)
    rows = reads.alarms_by_id(session, ids)
    for t, aid in zip(trans, ids, strict=False):
        row = rows.get(aid)
        body = reads.alarm_json(row, now=_at(t)) if row is not None else dict(t.alarm)
        body.update(transition_fields(t))
        out.append(body)
    return out


def _at(t: Transition) -> dt.datetime:
    """The transition's time: an event shows the alarm shelved as it was then (its
    ``shelved``, monitor/store/shelving.py)."""
    return dt.datetime.fromtimestamp(float(t.ts), dt.UTC)


def transition_fields(t: Transition) -> dict[str, Any]:
    """The fields an alarm event adds to the alarm: what happened, when, and to which."""
    return {
        "transition": t.name,
        "transition_at": iso_utc(t.ts),
        "previous_severity": t.previous_severity,
        "reading_id": t.reading_id,
        "ref": t.alarm_id,
    }
