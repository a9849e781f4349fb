"""Live passages: the run-ups and coast-downs in the incoming speed, their 1x Bode data
and resonance passages, each compared with the stored modes (docs/modes.md, "Live
passages in the service").

Each measurement point has a :class:`monitor.modes.passage_tracker.PassageTracker`;
:class:`PassageTrackers` holds those of one machine. The batch (monitor/service/batch.py)
feeds them inside its transaction, in arrival order (:func:`feed_reading`):

- a waveform feeds its own point's tracker: the reading's time, the analysis' running
  speed, the 1x velocity (mm/s peak, :data:`AMPLITUDE_UNIT`, as the trends show it and the
  ``passage`` command uses by default) and the 1x phase when the waveform carries
  once-per-revolution pulses. A waveform whose analysis failed, or that sensor health
  flags, feeds nothing: a faulted sensor's 1x is not the machine's;
- a speed message feeds every point's tracker of its machine with the speed alone, so the
  sweeps are followed between waveforms and while a sensor is faulted or absent.

A completed sweep's passages that would make a valid registry mode
(:func:`monitor.model.bounds.check_mode`: amplification factor >= 1, damping ratio below 1)
are compared with the machine's stored modes (:func:`monitor.modes.shift.compare_modes`,
tolerance :data:`monitor.modes.shift.DEFAULT_SHIFT_TOLERANCE_PCT`). A passage a stored mode
claims is that mode's finding at the point, applied to the machine's mode-shift alarms as
an impact test's is (:meth:`MachineEvaluator.observe_mode_findings`, the path of
``bumptest --record``, monitor/service/mode_findings.py); a passage no stored mode claims
is a candidate mode an engineer accepts or rejects (monitor/store/candidates.py).

The trackers' state is plain JSON (:meth:`PassageTrackers.snapshot`), stored beside the
detector state in the same transaction (monitor/service/states.py), so a restarted
service carries on exactly where the last commit left it.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from monitor.analysis.waveform import ReadingAnalysis
from monitor.detection.alarms import Transition
from monitor.detection.evaluator import MachineEvaluator
from monitor.detection.results import ReadingEvaluation
from monitor.model.bounds import check_mode
from monitor.model.registry import Machine, RegistryError
from monitor.model.timefmt import iso_utc
from monitor.modes.passage_tracker import (
    PASSAGE_SOURCE,
    PassageTracker,
    SweepPassages,
    stop_speed_hz,
)
from monitor.modes.runup import Passage
from monitor.modes.shift import ModeShift, compare_modes
from monitor.modes.sweeps import SweepRules
from monitor.service.items import Decoded, WaveformMessage

log = logging.getLogger("whirlwatch.service")

#: Unit of the 1x amplitudes fed: velocity, mm/s peak.
AMPLITUDE_UNIT = "mm/s"
#: Layout version of :meth:`PassageTrackers.snapshot`.
STATE_VERSION = 1


def sweep_rules(machine: Machine) -> SweepRules:
    """The sweep rules of ``machine``'s trackers: the defaults of
    :class:`~monitor.modes.sweeps.SweepRules`, stopped below half the minimum operating
    speed (:func:`~monitor.modes.passage_tracker.stop_speed_hz`, as the ``passage``
    command)."""
    return SweepRules(stop_hz=stop_speed_hz(machine))


@dataclass(frozen=True, eq=False)
class FoundPassage:
    """A passage of a sweep completed by a reading: ``seq`` its place among the sweep's
    passages (ascending in speed), ``detected_at`` the time of that reading (epoch s),
    ``shift`` the comparison with the stored mode that claimed it (None: a candidate)."""

    machine: str
    point: str
    sweep: SweepPassages
    seq: int
    detected_at: float
    shift: ModeShift | None

    @property
    def passage(self) -> Passage:
        return self.sweep.passages[self.seq]


class PassageTrackers:
    """The passage trackers of one machine's points, created on a point's first reading."""

    def __init__(self, trackers: Mapping[str, PassageTracker] | None = None) -> None:
        self._trackers: dict[str, PassageTracker] = dict(trackers or {})

    @classmethod
    def restore(cls, machine: Machine, state: Any) -> PassageTrackers:
        """The trackers of ``machine`` from their stored :meth:`snapshot` (None: none
        stored). A state this version cannot read is logged and started afresh: the
        sweeps under way are lost, nothing else."""
        if state is None:
            return cls()
        rules = sweep_rules(machine)
        try:
            if not isinstance(state, Mapping) or state.get("version") != STATE_VERSION:
                raise ValueError(f"passage tracker state is not of version {STATE_VERSION}.")
            return cls({str(p): PassageTracker(rules, unit=AMPLITUDE_UNIT, snapshot=snap)
                        for p, snap in state["points"].items()})
        except (KeyError, TypeError, AttributeError, ValueError) as exc:
            log.warning("passage trackers started afresh: stored state unreadable",
                        extra={"machine": machine.id, "error": str(exc)[:200]})
            return cls()

    def snapshot(self) -> dict[str, Any]:
        """The state as plain JSON: ``{"version", "points": {point: tracker snapshot}}``."""
        return {"version": STATE_VERSION,
                "points": {p: t.snapshot() for p, t in sorted(self._trackers.items())}}

    def sweeping(self, point: str) -> str | None:
        """'run-up' or 'coast-down' while ``point``'s speed is in a leg, else None."""
        t = self._trackers.get(point)
        return None if t is None else t.sweeping

    def _tracker(self, machine: Machine, point: str) -> PassageTracker:
        """``point``'s tracker on ``machine``'s current rules (a registry edit of the
        speed range carries the tracker's state over to the new rules)."""
        rules = sweep_rules(machine)
        t = self._trackers.get(point)
        if t is None or t.rules != rules:
            t = PassageTracker(rules, unit=AMPLITUDE_UNIT, snapshot=None if t is None else t.snapshot())
            self._trackers[point] = t
        return t

    def waveform(self, machine: Machine, analysis: ReadingAnalysis | None,
                 evaluation: ReadingEvaluation | None) -> list[tuple[str, SweepPassages]]:
        """Feed one waveform's reading (module docstring); the sweeps it completes."""
        if analysis is None or evaluation is None or not evaluation.health.ok:
            return []
        speed = float(analysis.speed_hz)
        if not (math.isfinite(speed) and speed >= 0):
            return []
        one = analysis.order(1.0)
        amplitude = phase = None
        if one is not None and math.isfinite(one.velocity_mm_s) and one.velocity_mm_s >= 0:
            amplitude = float(one.velocity_mm_s)
            if one.phase_deg is not None and math.isfinite(one.phase_deg):
                phase = float(one.phase_deg)
        tracker = self._tracker(machine, analysis.point)
        return [(analysis.point, sp) for sp in tracker.update(float(analysis.ts), speed, amplitude, phase)]

    def speed(self, machine: Machine, ts: float, speed_hz: float) -> list[tuple[str, SweepPassages]]:
        """Feed one speed message (epoch s, Hz) to every point of ``machine``; the sweeps
        it completes."""
        return [(p.id, sp) for p in machine.points
                for sp in self._tracker(machine, p.id).update(float(ts), float(speed_hz))]


def recordable(p: Passage, name: str = "passage") -> bool:
    """Whether passage ``p`` would make a valid registry mode (the registry's bounds,
    :func:`monitor.model.bounds.check_mode`): a peak broader than its own frequency (AF
    below 1) is no resonance to record."""
    try:
        check_mode(p.as_mode(name))
    except RegistryError:
        return False
    return p.amplification_factor is not None and p.damping_ratio is not None


def compare_sweep(machine: Machine, point: str, sp: SweepPassages, ts: float
                  ) -> tuple[list[FoundPassage], tuple[ModeShift, ...]]:
    """The recordable passages of one sweep, each with the stored mode that claimed it,
    and the comparison of every stored mode with them (for the mode-shift alarms)."""
    kept = [i for i, p in enumerate(sp.passages) if recordable(p)]
    if not kept:
        return [], ()
    findings = compare_modes(machine.modes, [sp.passages[i].frequency_hz for i in kept]) if machine.modes else ()
    claimed = {f.identified_hz: f for f in findings if f.identified_hz is not None}
    found = [FoundPassage(machine.id, point, sp, i, ts, claimed.get(sp.passages[i].frequency_hz))
             for i in kept]
    return found, findings


def feed_reading(trackers: PassageTrackers, ev: MachineEvaluator, item: Decoded,
                 evaluation: ReadingEvaluation | None) -> tuple[list[FoundPassage], list[Transition]]:
    """Feed one new reading to its machine's trackers; the passages of the sweeps it
    completes and the mode-shift alarm transitions their comparison with the stored modes
    causes (at the reading's time)."""
    machine = ev.machine
    if isinstance(item, WaveformMessage):
        sweeps = trackers.waveform(machine, item.analysis, evaluation)
    else:
        r = item.reading
        sweeps = trackers.speed(machine, r.ts, r.speed_hz)
    ts = float(item.reading.ts)
    out: list[FoundPassage] = []
    trans: list[Transition] = []
    for point, sp in sweeps:
        found, findings = compare_sweep(machine, point, sp, ts)
        out += found
        for f in found:
            p = f.passage
            log.info("passage", extra={
                "machine": machine.id, "point": point, "kind": sp.kind,
                "natural_frequency_hz": round(p.frequency_hz, 4),
                "damping_ratio": round(p.damping_ratio or 0.0, 5),
                "mode": None if f.shift is None else f.shift.mode})
        if any(f.status != "not_found" for f in findings):
            trans += ev.observe_mode_findings(findings, ts, point=point, evidence={
                "source": PASSAGE_SOURCE, "sweep": sp.kind,
                "started_at": iso_utc(sp.sweep.started_at, timespec="milliseconds"),
                "ended_at": iso_utc(sp.sweep.ended_at, timespec="milliseconds"),
                "method": sp.method})
    return out, trans

