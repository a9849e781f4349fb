"""The amplitude-growth state of one machine: a baseline and a trend window per feature of
each point, fed by the readings growth uses, judged by
:class:`~monitor.detection.growth_rules.GrowthRules`, and the levels given to the alarm
engine (docs/alarms.md, "amplitude_growth").

Which readings each rule sees:

- a reading sensor health flagged, or taken with the machine stopped
  (:mod:`monitor.detection.running`), is judged by no rule (it neither raises nor clears);
- a reading taken while the speed sweeps an excitation through a required band
  (:mod:`monitor.detection.dwell`) is judged by its zone only: it feeds no baseline and no
  trend window;
- the speed-normalised 1x divides out the speed squared, which holds only away from
  resonance: a reading whose 1x lies inside a mode's required band leaves that one feature
  out (an amplification the baseline did not have is not growth);
- speed-dependent features are compared with their baseline only near its speed, and
  their trend window starts afresh when the speed leaves that band.

The next growth transition's evidence counts the readings left out, by reason.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Iterable, Sequence
from typing import Any, Literal, NamedTuple

from monitor.analysis.waveform import ReadingAnalysis
from monitor.detection.alarms import AlarmEngine, AlarmKey, Transition
from monitor.detection.features import ONE_X_NORMALISED, Feature, growth_orders, reading_features
from monitor.detection.growth import Baseline, TrendWindow, fit_due_windows
from monitor.detection.growth_rules import FeatureVerdict, GrowthRules, InBand, Sweeping
from monitor.detection.results import FeatureRows
from monitor.detection.zones import ZoneLimits
from monitor.model.detection_settings import DetectionSettings
from monitor.model.registry import Machine

#: Why growth leaves a reading out: the key its count goes under (``ignored_readings`` of
#: a growth transition's evidence) and the start of ``growth_ignored``.
IgnoreReason = Literal["sensor fault", "sweep through band", "machine stopped"]
SENSOR_FAULT: IgnoreReason = "sensor fault"
SWEEP: IgnoreReason = "sweep through band"
#: Taken with the machine stopped (monitor/detection/running.py): judged by no rule, as a
#: sensor fault's reading.
STOPPED: IgnoreReason = "machine stopped"


class Ignored(NamedTuple):
    """Why growth leaves a reading out: the ``reason`` and what caused it (the failed
    checks, or the subjects whose required band the speed was sweeping through). A sensor
    fault leaves the reading out of every growth rule; a sweep only out of the baseline
    and the trend (its zone is judged)."""

    reason: IgnoreReason
    causes: tuple[str, ...]

    def text(self) -> str:
        """``growth_ignored`` of the evaluation: ``'<reason>: <cause>, <cause>'``."""
        return f"{self.reason}: {', '.join(self.causes)}"


class _Slot(NamedTuple):
    """The state of one growth feature of one point."""

    baseline: Baseline
    window: TrendWindow
    key: AlarmKey


class GrowthWatch:
    """The amplitude-growth state of one machine (module docstring).

    Parameters
    ----------
    machine : Machine
        A validated registry entry.
    settings : DetectionSettings
        The machine's detection settings.
    """

    def __init__(self, machine: Machine, settings: DetectionSettings) -> None:
        self.machine = machine
        self.settings = settings
        self.rules = GrowthRules.from_settings(settings)
        #: (order, feature) of the order features other than 1x.
        self.orders = growth_orders(machine)
        self.baselines: dict[tuple[str, str], Baseline] = {}
        self.trends: dict[tuple[str, str], TrendWindow] = {}
        #: Per point: readings left out since the last growth transition, by reason.
        self.ignored: dict[str, dict[str, int]] = {}
        # Per point: feature name -> its slot, the same objects as in baselines/trends, so
        # a reading finds all three with one lookup.
        self._slots: dict[str, dict[str, _Slot]] = {}
        self._fed: set[AlarmKey] = set()  # growth keys that ever fed the engine

    def reading(self, engine: AlarmEngine, analysis: ReadingAnalysis, pid: str, limits: ZoneLimits,
                ignored: Ignored | None, one_x_bands: tuple[str, ...] = ()) -> tuple[FeatureRows, list[Transition]]:
        """Amplitude-growth alarms of one reading of point ``pid``: its features fed to
        their baselines and trend windows and judged by the rules that see them (module
        docstring), and the levels given to ``engine``. ``ignored`` says why the reading is
        left out of growth (None: it is not); ``one_x_bands`` the subjects whose required
        band holds 1x at the reading's speed. The features' evaluations are built only
        when something reads them."""
        ts = float(analysis.ts)
        speed = float(analysis.speed_hz)
        rid = analysis.reading_id
        counts = self.ignored.setdefault(pid, {})
        if ignored is not None:
            counts[ignored.reason] = counts.get(ignored.reason, 0) + 1
        # A sweep's reading is judged by its zone (no baseline, no trend); a sensor fault's
        # by nothing.
        judged = ignored is None or ignored.reason == SWEEP
        left_out: Sweeping | None = Sweeping(ignored.causes) if ignored is not None and judged else None
        in_band = InBand(one_x_bands) if one_x_bands and ignored is None else None
        judge = self.rules.judge
        verdicts: list[FeatureVerdict] = []
        due: list[tuple[int, AlarmKey]] = []
        for feature, value, slot, comparable, used in self._feed(analysis, pid, ts, speed, ignored is None, in_band):
            trend = slot.window.trend() if used else None
            status = left_out if left_out is not None else (in_band if not used and ignored is None else None)
            verdict = judge(feature, value, slot.baseline, comparable, speed, trend, limits, status)
            verdicts.append(verdict)
            # A key that never fed the engine has no alarm to count down.
            if judged and (verdict.raise_rank or verdict.hold_rank or (
                    slot.key in self._fed and engine.alarm(slot.key) is not None)):
                due.append((len(verdicts) - 1, slot.key))
                self._fed.add(slot.key)
        features = FeatureRows(verdicts)
        out: list[Transition] = []
        for i, key in due:
            evidence = functools.partial(_growth_evidence, rid, speed, limits, features, i, counts)
            out += engine.update_ranked(key, ts, verdicts[i].raise_rank, verdicts[i].hold_rank, evidence, rid)
        if out:
            counts.clear()  # reported in these transitions' evidence
        return features, out

    def restart(self, point_id: str, ts: float, feature: str | None = None) -> None:
        """Learn the baseline (and trend) of ``point_id`` again from the next readings,
        for one ``feature`` or all."""
        for (pid, name), b in list(self.baselines.items()):
            if pid == point_id and (feature is None or name == feature):
                b.restart(ts)
                self.trends[(pid, name)].clear()

    def snapshot(self) -> dict[str, Any]:
        """The ``baselines``, ``trends`` and ``ignored`` parts of the detector state."""
        return {"baselines": [[p, f, b.snapshot()] for (p, f), b in self.baselines.items()],
                "trends": [[p, f, w.snapshot()] for (p, f), w in self.trends.items()],
                "ignored": {p: dict(c) for p, c in self.ignored.items()}}

    def restore(self, data: dict[str, Any], keys: Iterable[AlarmKey]) -> None:
        """Take the parts of :meth:`snapshot` from a detector state, and mark the growth
        keys among a restored engine's ``keys`` as fed."""
        for p, f, b in data.get("baselines", []):
            self.baselines[(p, f)] = Baseline.restore(b)
        for p, f, w in data.get("trends", []):
            self.trends[(p, f)] = TrendWindow.restore(w)
        self.ignored = {p: dict(c) for p, c in data.get("ignored", {}).items()}
        self._fed = {k for k in keys if k.kind == "amplitude_growth"}

    def _slot(self, pid: str, name: str, speed_band: float | None) -> _Slot:
        """The baseline, trend window and growth alarm key of one feature of a point,
        made on the feature's first reading (or taken from a restored snapshot)."""
        s = self.settings
        k = (pid, name)
        base = self.baselines.get(k)
        if base is None:
            base = self.baselines[k] = Baseline(s.baseline_readings)
        win = self.trends.get(k)
        if win is None:
            win = self.trends[k] = TrendWindow(s.trend_window, s.trend_min_readings, s.trend_refit_every, speed_band)
        return _Slot(base, win, AlarmKey(self.machine.id, pid, "amplitude_growth", name))

    def _feed(self, analysis: ReadingAnalysis, pid: str, ts: float, speed: float, use: bool,
              in_band: InBand | None) -> Sequence[tuple[Feature, float, _Slot, bool, bool]]:
        """The growth features of a reading of point ``pid`` at ``ts`` (epoch s) and
        ``speed`` (Hz) with their slots, whether each is comparable with its baseline (the
        speed within the baseline's band) and whether it was used. With ``use``, each
        finite value >= 0 is fed to its baseline (while learning) and trend window (but
        the speed-normalised 1x while ``in_band``), and the windows due are refitted
        together; without, nothing is fed."""
        band = self.settings.baseline_speed_band_pct / 100.0
        slots = self._slots.get(pid)
        if slots is None:
            slots = self._slots[pid] = {}
        fed: list[tuple[Feature, float, _Slot, bool, bool]] = []
        due_fits: list[TrendWindow] = []
        for feature, value in reading_features(analysis, self.machine, self.orders):
            if not (0.0 <= value < math.inf):  # finite and not negative (NaN fails too)
                continue
            slot = slots.get(feature.name)
            if slot is None:
                slot = slots[feature.name] = self._slot(pid, feature.name, band if feature.speed_dependent else None)
            comparable = True
            used = use and not (in_band is not None and feature is ONE_X_NORMALISED)
            if used:
                base = slot.baseline
                if base.stats is None:
                    base.add(value, speed, ts)
                base_speed = base.speed_hz
                comparable = not (feature.speed_dependent and base_speed
                                  and abs(speed - base_speed) > band * base_speed)
                if slot.window.add(ts, value, speed):
                    due_fits.append(slot.window)
            fed.append((feature, value, slot, comparable, used))
        if due_fits:
            fit_due_windows(due_fits)
        return fed


def _growth_evidence(rid: str | None, speed: float, limits: ZoneLimits, features: FeatureRows, i: int,
                     counts: dict[str, int]) -> dict[str, Any]:
    """A growth transition's evidence: the feature's evaluation and the readings growth
    left out since the last growth transition, by reason."""
    return {"reading_id": rid, "speed_hz": speed, "zone_limits_mm_s": list(limits.as_tuple()),
            **features[i].to_json(), "ignored_readings": dict(counts)}
