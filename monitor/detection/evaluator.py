"""State detection for one machine: readings in, alarm transitions and evaluations out.

:class:`MachineEvaluator` ties together sensor health (``health``), resonance proximity
(``resonance``: separation margins, dwell and ramp forecasts), severity zones (``zones``),
baselines and trends (``growth_watch``: ``growth`` judged by ``growth_rules``) and the
alarm engine (``alarms``). It is deterministic and does no I/O: the caller passes each
:class:`~monitor.analysis.waveform.ReadingAnalysis` with its
:class:`~monitor.model.readings.Waveform`, speed readings, and the current time for
stale-stream checks; it gets back :class:`~monitor.detection.alarms.Transition` objects to
store and publish, and a :class:`~monitor.detection.results.ReadingEvaluation` for the
store and the dashboard. ``snapshot()`` returns a JSON-able dict that keeps every float
exactly (format in docs/store.md); ``MachineEvaluator.restore`` rebuilds the same state
after a restart. The service keeps one evaluator per machine (monitor/service/states.py).

Rules
-----
- A reading flagged by sensor health raises ``sensor_fault`` alarms only: it updates no
  machine alarm (resonance or growth), and its speed is not used.
- Resonance alarms are per machine (``point`` None), subject ``'<mode>@<excitation>'``; they
  advance on every new speed value (from a reading or a speed message, so a speed stream
  keeps them going while the vibration sensor is faulted or absent; a value whose time is
  not later than the last one is shown but not counted twice). A level is raised only
  once the excitation has dwelt in its band for ``resonance_dwell_s``
  (:mod:`monitor.detection.dwell`): a run-up or coast-down passing through is not alarmed.
- The zone of every reading sensor health accepts is judged, whatever the resonance state.
  Growth (baseline and trend) leaves out the readings taken while the speed sweeps an
  excitation through a required band (a transient response, comparable with nothing); the
  next growth transition's evidence counts them. Readings at a steady speed next to a mode
  are used: the amplification there is constant, so growth there is still growth.
- Baseline ratios of speed-dependent features (overall, 1x, 2x, orders) are compared only
  when the running speed is within ``baseline_speed_band_pct`` of the baseline's speed,
  and their trend window starts afresh when the speed leaves that band around the speed
  the window started at; the speed-normalised 1x is compared and trended at any speed
  but one that puts 1x inside a mode's required band (its normalisation assumes no
  resonant amplification).

Settings (keys of the machine's registry table, ``machine.settings``; docs/alarms.md):
see :class:`~monitor.model.detection_settings.DetectionSettings`.
"""

from __future__ import annotations

import math
from collections import deque
from collections.abc import Collection, Mapping, Sequence
from typing import TYPE_CHECKING, Any

from monitor.analysis.waveform import ReadingAnalysis
from monitor.detection.alarms import AlarmEngine, AlarmKey, AlarmKind, Severity, Transition
from monitor.detection.approach import ApproachForecast
from monitor.detection.growth_watch import SENSOR_FAULT, STOPPED, SWEEP, GrowthWatch, Ignored
from monitor.detection.health import HealthCheck, HealthReport, check_waveform, is_stale
from monitor.detection.margins import MarginRow, MarginRows
from monitor.detection.resonance import ResonanceWatch
from monitor.detection.results import (
    FeatureEvaluation,
    ReadingEvaluation,
    SpeedEvaluation,
)
from monitor.detection.running import RunJudgement, RunningWatch
from monitor.detection.state_json import (
    STATE_FORMAT,
    float_out,
    floats_in,
    floats_out,
    number_in,
    upgrade_snapshot,
)
from monitor.detection.zones import zone_limits, zone_of
from monitor.model.bounds import check_machine
from monitor.model.detection_settings import DetectionSettings
from monitor.model.readings import SpeedReading, Waveform
from monitor.model.registry import Machine

if TYPE_CHECKING:  # the mode tests build on detection, not the other way round
    from monitor.modes.shift import ModeShift

#: Why an alarm closes when what it watches leaves the registry: the ``reason`` of its
#: ``cleared`` transition's evidence (docs/alarms.md, "Alarms of what leaves the registry").
MODE_REMOVED = "mode removed from the registry"
EXCITATION_REMOVED = "excitation removed from the registry"
POINT_RETIRED = "point retired from the registry"
MACHINE_RETIRED = "machine retired from the registry"
#: Why growth left out a reading of a point out of service (its ``growth_ignored``).
OUT_OF_SERVICE = "out of service"

#: Severity of each sensor-health check (docs/alarms.md).
SENSOR_FAULT_SEVERITY: dict[HealthCheck, Severity] = {
    "flat_line": "alert", "clipping": "alert", "dropouts": "alert", "stale": "alert",
    "sample_rate": "alert", "unit": "alert", "spikes": "advisory",
}

_NO_MARGINS = MarginRows()


def validate_machine(machine: Machine) -> DetectionSettings:
    """Check what detection relies on (the registry's bounds,
    :func:`monitor.model.bounds.check_machine`); ValueError naming the machine, entry and
    field.

    Returns the machine's :class:`~monitor.model.detection_settings.DetectionSettings`.
    """
    check_machine(machine)
    return DetectionSettings.from_mapping(machine.settings, f"machine {machine.id!r}")


class MachineEvaluator:
    """Detection state of one machine (see the module docstring).

    Parameters
    ----------
    machine : Machine
        Validated with :func:`validate_machine` (ValueError naming the field).
    """

    def __init__(self, machine: Machine) -> None:
        self.machine = machine
        self.settings = validate_machine(machine)
        s = self.settings
        self.engine = AlarmEngine(s.persistence)
        self._resonance = ResonanceWatch(machine, s)
        self._growth = GrowthWatch(machine, s)
        self.running = RunningWatch(
            s.min_running_speed_hz if s.min_running_speed_hz is not None else machine.speed_range_hz[0],
            s.stopped_overall_mm_s)
        self._last_ts: dict[str, float] = {}
        self._intervals: dict[str, deque[float]] = {}
        self._keys: dict[tuple[str | None, str, str], AlarmKey] = {}
        self._fault_seen: set[str] = set()  # points whose block checks ever fed the engine
        # Whether every open alarm is known to fit this registry entry (a fresh evaluator
        # has none; a restored one is checked by close_orphaned_alarms).
        self._orphans_checked = True
        self._limits = {p.id: zone_limits(machine.machine_class, machine.limits_mm_s, p.limits_mm_s)
                        for p in machine.points}

    # ------------------------------------------------------------------ readings

    def evaluate(self, analysis: ReadingAnalysis | None, waveform: Waveform | None = None) -> ReadingEvaluation:
        """Evaluate one reading of a point.

        ``analysis`` may be None when the analysis failed (then only health is checked,
        from ``waveform``); ``waveform`` may be None when only the analysis is at hand
        (then no health checks). At least one is required.
        """
        src = analysis if analysis is not None else waveform
        if src is None:
            raise ValueError("evaluate needs an analysis or a waveform, got neither.")
        if src.machine != self.machine.id:
            raise ValueError(f"reading is for machine {src.machine!r}, this evaluator is for {self.machine.id!r}.")
        point = self.machine.point(src.point)
        ts = float(src.ts)
        rid = src.reading_id
        trans: list[Transition] = []

        health = check_waveform(waveform, point) if waveform is not None else HealthReport()
        trans += self._arrival(point.id, ts, rid)
        trans += self._sensor_alarms(point.id, ts, rid, health)
        suppressed = not health.ok or analysis is None

        limits = self._limits[point.id]
        speed = float(analysis.speed_hz) if analysis is not None else None
        approach: tuple[ApproachForecast, ...] = ()
        margins = _NO_MARGINS
        sweeping: list[str] = []
        one_x_bands: tuple[str, ...] = ()
        run = self._judge_running(analysis, ts) if analysis is not None and health.ok else None
        if speed is not None and math.isfinite(speed) and speed > 0:
            if not suppressed and not _false_speed(run, analysis):
                sweeping, approach, t, one_x_bands = self._resonance.at_speed(self.engine, ts, speed, rid)
                trans += t
            margins = self._resonance.rows(speed)
        elif speed == 0.0 and not suppressed:
            self._resonance.stopped()

        overall = zone = None
        feats: Sequence[FeatureEvaluation] = ()
        ignored: Ignored | None = None
        if analysis is not None:
            overall = float(analysis.overall_velocity_mm_s_rms)
            zone = zone_of(overall, limits) if math.isfinite(overall) and overall >= 0 else None
            if not health.ok:
                ignored = Ignored(SENSOR_FAULT, health.checks)
            elif run is not None and run.stopped:
                ignored = Ignored(STOPPED, (run.reason or "",))
            elif sweeping:
                ignored = Ignored(SWEEP, tuple(sweeping))
            feats, t = self._growth.reading(self.engine, analysis, point.id, limits, ignored, one_x_bands)
            trans += t
        # Every field set at once, past the frozen dataclass's __init__ (one
        # object.__setattr__ per field, a measurable part of a reading's detection).
        out = object.__new__(ReadingEvaluation)
        out.__dict__.update(
            machine=self.machine.id, point=point.id, ts=ts, reading_id=rid, speed_hz=speed,
            overall_velocity_mm_s_rms=overall, zone=zone, zone_limits=limits, margins=margins,
            approach=approach, features=feats, health=health,
            growth_ignored=None if ignored is None else ignored.text(),
            machine_alarms_suppressed=suppressed, transitions=tuple(trans), out_of_service=False, running=run,
        )
        return out

    # ------------------------------------------------------------------ out of service

    def evaluate_out_of_service(self, analysis: ReadingAnalysis | None,
                                waveform: Waveform | None = None) -> ReadingEvaluation:
        """Evaluate a reading of a point out of service (planned work; ISA-18.2 / IEC 62682
        "out of service"): its zone, margins and sensor health are worked out for the
        record, but the alarm engine, the resonance stays and the growth baselines and
        trends are left untouched (no transition, nothing learnt; open alarms stay as they
        are). Only the point's arrival times move on, so its stale-stream check counts
        from its latest reading once it is back in service. Marked ``out_of_service``."""
        src = analysis if analysis is not None else waveform
        if src is None:
            raise ValueError("evaluate_out_of_service needs an analysis or a waveform, got neither.")
        if src.machine != self.machine.id:
            raise ValueError(f"reading is for machine {src.machine!r}, this evaluator is for {self.machine.id!r}.")
        point = self.machine.point(src.point)
        ts = float(src.ts)
        self._note_arrival(point.id, ts)
        health = check_waveform(waveform, point) if waveform is not None else HealthReport()
        limits = self._limits[point.id]
        speed = float(analysis.speed_hz) if analysis is not None else None
        margins = self._resonance.rows(speed) if speed is not None and math.isfinite(speed) and speed > 0 \
            else _NO_MARGINS
        overall = float(analysis.overall_velocity_mm_s_rms) if analysis is not None else None
        zone = zone_of(overall, limits) if overall is not None and math.isfinite(overall) and overall >= 0 else None
        return ReadingEvaluation(
            machine=self.machine.id, point=point.id, ts=ts, reading_id=src.reading_id, speed_hz=speed,
            overall_velocity_mm_s_rms=overall, zone=zone, zone_limits=limits, margins=margins, approach=(),
            features=(), health=health, growth_ignored=OUT_OF_SERVICE, machine_alarms_suppressed=True,
            out_of_service=True)

    # ------------------------------------------------------------------ speed

    def evaluate_speed(self, reading: SpeedReading) -> SpeedEvaluation:
        """A running-speed message (Hz, from the speed topic or a tach) for this machine:
        advances the resonance alarms and gives the margin table at that speed, whatever
        the state of the vibration sensors. Speed 0 (standing still) ends every stay in a
        band and evaluates nothing else."""
        if reading.machine != self.machine.id:
            raise ValueError(f"speed is for machine {reading.machine!r}, this evaluator is for {self.machine.id!r}.")
        sp = float(reading.speed_hz)
        if not (math.isfinite(sp) and sp >= 0):
            raise ValueError(f"speed_hz must be a finite speed >= 0, got {reading.speed_hz!r}.")
        ts = float(reading.ts)
        self.running.saw_speed(ts, sp)
        if sp == 0.0:
            self._resonance.stopped()
            return SpeedEvaluation(self.machine.id, ts, sp, _NO_MARGINS, (), (), ())
        outcome = self._resonance.at_speed(self.engine, ts, sp, None)
        return SpeedEvaluation(self.machine.id, ts, sp, self._resonance.rows(sp), outcome.approach,
                               tuple(outcome.sweeping), tuple(outcome.transitions))

    def observe_speed(self, reading: SpeedReading) -> list[Transition]:
        """:meth:`evaluate_speed`'s alarm transitions."""
        return list(self.evaluate_speed(reading).transitions)

    @property
    def latest_speed(self) -> tuple[float, float] | None:
        """The latest running speed counted, ``(epoch s, Hz)``, from a reading or a speed
        message, or None before any."""
        speeds = self._resonance.speeds
        return speeds[-1] if speeds else None

    def observe_mode_findings(self, findings: Sequence[ModeShift], ts: float, *, point: str | None = None,
                              evidence: Mapping[str, Any] | None = None) -> list[Transition]:
        """Mode-shift alarms from the comparison of an impact test or a run-up/coast-down
        with the stored modes (:func:`monitor.modes.shift.compare_modes`), at ``ts`` (epoch s).

        A mode that moved beyond the tolerance raises (or keeps) its alarm at once: one test
        is one reading, so persistence does not apply. Severity ``advisory`` beyond the
        tolerance, ``alert`` beyond twice the tolerance (our choice, docs/alarms.md). A test
        that finds the mode back within the tolerance clears it; a mode the test did not
        find leaves its alarm as it is. ``point`` is the test's measurement point (None for
        a machine-level source); ``evidence`` is added to each transition's evidence.
        """
        if point is not None:
            self.machine.point(point)
        names = {m.name for m in self.machine.modes}
        out: list[Transition] = []
        for f in findings:
            if f.mode not in names:
                raise ValueError(f"finding names mode {f.mode!r}, which machine {self.machine.id!r} does not have.")
            if f.status == "not_found":
                continue
            level: Severity | None = None
            if f.status == "shifted":
                level = "alert" if abs(f.shift_pct or 0.0) > 2.0 * f.tolerance_pct else "advisory"
            ev = {**f.to_json(), **(evidence or {})}
            out += self.engine.update(self._key(point, "mode_shift", f.mode), float(ts), level, level, ev,
                                      None, persistence=1)
        return out

    def margins_at(self, speed_hz: float) -> tuple[MarginRow, ...]:
        """The margin table at any running speed (Hz), e.g. for a resonance map."""
        grid = self._resonance.grid
        return grid.rows(grid.compute(speed_hz))

    def check_stale(self, now: float, out_of_service: Collection[str] = ()) -> list[Transition]:
        """Raise ``sensor_fault``/``stale`` for points silent for ``stale_intervals``
        expected intervals at time ``now`` (epoch seconds); cleared by the next reading.
        Points in ``out_of_service`` (ids) are not checked: planned work raises nothing."""
        out: list[Transition] = []
        if self._stale_quiet(now):
            return out
        for pid, last in sorted(self._last_ts.items()):
            if pid in out_of_service:
                continue
            exp = self._expected_interval(pid)
            if is_stale(last, now, exp, self.settings.stale_intervals):
                key = AlarmKey(self.machine.id, pid, "sensor_fault", "stale")
                ev = {"check": "stale", "last_reading_ts": last, "now": now,
                      "expected_interval_s": exp, "silent_s": now - last,
                      "message": f"no reading for {now - last:.0f} s, expected one every {exp:.0f} s"}
                out += self.engine.update(key, now, "alert", "alert", ev, None, persistence=1)
        return out

    # ------------------------------------------------------------------ engineer actions

    def acknowledge(self, alarm_id: str, user: str, comment: str, ts: float) -> Transition:
        """Acknowledge an alarm by a named user with a comment (does not clear it)."""
        return self.engine.acknowledge(alarm_id, user, comment, ts)

    def restart_baseline(self, point_id: str, ts: float, feature: str | None = None) -> None:
        """Learn the baseline (and trend) of ``point_id`` again from the next readings,
        for one ``feature`` or all; e.g. after maintenance."""
        self.machine.point(point_id)
        self._growth.restart(point_id, ts, feature)

    def active_alarms(self) -> list[dict[str, Any]]:
        """JSON of every alarm not cleared."""
        return [a.to_json() for a in self.engine.active()]

    # ------------------------------------------------------------------ registry changes

    def retired_reason(self, key: AlarmKey) -> str | None:
        """Why an alarm of ``key`` can no longer be evaluated on this machine's registry
        entry (its point, mode or excitation was taken out: :data:`POINT_RETIRED`,
        :data:`MODE_REMOVED`, :data:`EXCITATION_REMOVED`), or None while it can."""
        if key.point is not None and key.point not in self._limits:
            return POINT_RETIRED
        if key.kind == "resonance_proximity":
            if key.subject in self._resonance.index:
                return None
            mode = key.subject.rpartition("@")[0]
            return EXCITATION_REMOVED if any(m.name == mode for m in self.machine.modes) else MODE_REMOVED
        if key.kind == "mode_shift":
            return None if any(m.name == key.subject for m in self.machine.modes) else MODE_REMOVED
        if key.kind == "amplitude_growth":
            # An order feature of an order no longer excited; the fixed features and the
            # bearing lines (present as the analysis finds them) stay.
            name = key.subject
            if name.endswith("x") and name not in ("1x", *(f.name for _, f in self._growth.orders)):
                return EXCITATION_REMOVED
        return None

    def close_orphaned_alarms(self, ts: float) -> list[Transition]:
        """Close, at ``ts`` (epoch s), every live alarm that no longer fits this registry
        entry (:meth:`retired_reason`; a mode deleted or renamed, a point retired, an
        excitation order removed): a ``cleared`` transition each, evidence
        ``{"reason": ..., "message": ...}``, in key order. Nothing else would ever clear
        them. Only a restored evaluator (:meth:`restore`: the state may come from an
        older entry) can hold such alarms, and it is checked once; later calls return
        nothing at once."""
        if self._orphans_checked:
            return []
        self._orphans_checked = True
        out: list[Transition] = []
        for key in sorted(self.engine.alarm_keys(), key=AlarmKey.text):
            reason = self.retired_reason(key)
            if reason is None:
                continue
            what = f"point {key.point!r}" if reason == POINT_RETIRED else f"{key.kind} subject {key.subject!r}"
            out += self.engine.end(key, float(ts), {
                "reason": reason,
                "message": f"{what} is no longer in the registry entry of machine {self.machine.id!r}; "
                           "nothing evaluates this alarm any more"})
        return out

    # ------------------------------------------------------------------ persistence

    def snapshot(self) -> dict[str, Any]:
        """JSON-able state of this machine's detection, exact to the bit: non-finite
        floats as tagged strings (:mod:`monitor.detection.state_json`), format
        :data:`~monitor.detection.state_json.STATE_FORMAT` (docs/store.md)."""
        speeds = self._resonance.speeds
        speed: list[list[float]] | list[list[float | str]] = [list(x) for x in speeds]
        if not math.isfinite(sum(t + v for t, v in speeds)):  # rare: tag what is not finite
            speed = [floats_out(x) for x in speeds]
        return {
            "format": STATE_FORMAT,
            "machine": self.machine.id,
            "engine": self.engine.snapshot(),
            **self._growth.snapshot(),
            "speed": speed,
            "stays": self._resonance.stays_snapshot(),
            "last_ts": {p: float_out(t) for p, t in self._last_ts.items()},
            "intervals": {p: floats_out(d) for p, d in self._intervals.items()},
            "running": self.running.snapshot(),
        }

    @classmethod
    def restore(cls, machine: Machine, data: Mapping[str, Any]) -> MachineEvaluator:
        """Rebuild from :meth:`snapshot` (the machine's registry entry may have changed);
        a snapshot of an older format is converted first (:func:`upgrade_snapshot`).
        ValueError naming the machine and the field for a snapshot that cannot be read.

        The entry may have changed since the snapshot was taken: the reading times of
        points no longer in it are dropped (a retired point is not a silent one), and
        alarms of what it no longer holds stay open until :meth:`close_orphaned_alarms`
        closes them at the caller's time (the service does so in the transaction that
        takes the state, recording and publishing the transitions)."""
        if data.get("machine") != machine.id:
            raise ValueError(f"snapshot is for machine {data.get('machine')!r}, not {machine.id!r}.")
        data = upgrade_snapshot(data)
        ev = cls(machine)
        eng = dict(data["engine"])
        eng["persistence"] = ev.settings.persistence
        ev.engine = AlarmEngine.restore(eng)
        ev._growth.restore(dict(data), ev.engine.alarm_keys())
        ev._resonance.speeds.extend((t, v) for t, v in (floats_in(x) for x in data.get("speed", [])))
        ev._resonance.restore_stays(data.get("stays"))
        points = ev._limits
        ev._last_ts = {p: number_in(t, f"last_ts {p}") for p, t in data.get("last_ts", {}).items()
                       if p in points}
        ev._intervals = {p: deque(floats_in(v), maxlen=10) for p, v in data.get("intervals", {}).items()
                         if p in points}
        ev._fault_seen = {k.point for k in ev.engine.alarm_keys()
                          if k.kind == "sensor_fault" and k.subject != "stale" and k.point is not None}
        ev._resonance.restore(ev.engine.alarm_keys())
        ev.running.restore(data.get("running"))
        ev._orphans_checked = not ev.engine.active()
        return ev

    # ------------------------------------------------------------------ running / stopped

    def _judge_running(self, analysis: ReadingAnalysis, ts: float) -> RunJudgement:
        """Whether ``analysis`` was taken with the machine running (monitor/detection/running.py)."""
        return self.running.judge(ts, float(analysis.speed_hz), analysis.speed_source,
                                  float(analysis.overall_velocity_mm_s_rms))

    def _stale_quiet(self, now: float) -> bool:
        """No stale-stream alarm while a stop is detected or announced (monitor/detection/running.py)."""
        return self.running.quiet_at(now)

    # ------------------------------------------------------------------ internals

    def _key(self, point: str | None, kind: AlarmKind, subject: str) -> AlarmKey:
        k = (point, kind, subject)
        key = self._keys.get(k)
        if key is None:
            key = self._keys[k] = AlarmKey(self.machine.id, point, kind, subject)
        return key

    def _expected_interval(self, pid: str) -> float | None:
        if self.settings.reading_interval_s is not None:
            return self.settings.reading_interval_s
        d = self._intervals.get(pid)
        if not d or len(d) < 3:
            return None
        return sorted(d)[len(d) // 2]

    def _note_arrival(self, pid: str, ts: float) -> None:
        """Move the arrival time and interval history of ``pid`` on (a reading at ``ts``)."""
        last = self._last_ts.get(pid)
        if last is None:
            self._last_ts[pid] = ts
        elif ts > last:
            d = self._intervals.get(pid)
            if d is None:
                d = self._intervals[pid] = deque(maxlen=10)
            d.append(ts - last)
            self._last_ts[pid] = ts

    def _arrival(self, pid: str, ts: float, rid: str | None) -> list[Transition]:
        self._note_arrival(pid, ts)
        key = self._key(pid, "sensor_fault", "stale")
        a = self.engine.alarm(key)
        if a is not None and a.state != "cleared":
            return self.engine.update(key, ts, None, None, {"check": "stale", "message": "readings arrive again"},
                                      rid, persistence=1)
        return []

    def _sensor_alarms(self, pid: str, ts: float, rid: str | None, health: HealthReport) -> list[Transition]:
        if not health.flags and pid not in self._fault_seen:
            return []  # no check fails and none ever did: nothing to count
        self._fault_seen.add(pid)
        out: list[Transition] = []
        flagged = {f.check: f for f in health.flags}
        for check, sev in SENSOR_FAULT_SEVERITY.items():
            if check == "stale":
                continue
            key = self._key(pid, "sensor_fault", check)
            f = flagged.get(check)
            if f is None and self.engine.alarm(key) is None:
                continue  # nothing to count for a check that never failed
            lvl: Severity | None = sev if f is not None else None
            ev = {"check": check, "message": f.message if f else "check passes",
                  "value": f.value if f else None, "reading_id": rid}
            out += self.engine.update(key, ts, lvl, lvl, ev, rid)
        return out


def _false_speed(run: RunJudgement | None, analysis: ReadingAnalysis | None) -> bool:
    """A stopped reading's speed estimated from its spectrum is not the running speed (the
    estimate is searched inside the operating range: below it, it locks onto a harmonic);
    it does not feed the resonance alarms."""
    return run is not None and run.stopped and analysis is not None and analysis.speed_source == "estimated"
