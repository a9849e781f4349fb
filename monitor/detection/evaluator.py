"""State detection for one machine: readings in, alarm transitions and evaluations out.

:class:`MachineEvaluator` ties together sensor health (``health``), separation margins
(``margins``), severity zones (``zones``), baselines and trends (``growth``) and the alarm
engine (``alarms``). It is deterministic and does no I/O: the caller passes each
:class:`~monitor.analysis.waveform.ReadingAnalysis` with its :class:`~monitor.model.readings.Waveform`,
speed readings, and the current time for stale-stream checks; it gets back
:class:`~monitor.detection.alarms.Transition` objects to store and publish, and a
:class:`ReadingEvaluation` for the store and the dashboard. ``snapshot()`` returns a
JSON-able dict that keeps every float exactly (format in docs/store.md);
``MachineEvaluator.restore`` rebuilds the same state after a restart. The service keeps
one evaluator per machine (monitor/service/states.py).

Rules
-----
- A reading flagged by sensor health raises ``sensor_fault`` alarms only: it updates no
  machine alarm (resonance or growth), and its speed is not used.
- Resonance alarms are per machine (``point`` None), subject ``'<mode>@<excitation>'``; they
  advance on every new speed value (from a reading or a speed message; a value whose
  time is not later than the last one is shown but not counted twice).
- Growth ignores readings taken with an excitation inside a required band (not comparable
  with the baseline); the next growth transition's evidence counts them.
- Baseline ratios of speed-dependent features (overall, 1x, 2x, orders) are compared only
  when the running speed is within ``baseline_speed_band_pct`` of the baseline's speed,
  and their trend window starts afresh when the speed leaves that band around the speed
  the window started at; the speed-normalised 1x is always compared and trended.

Settings (keys of the machine's registry table, ``machine.settings``; docs/alarms.md):
see :class:`DetectionSettings`.
"""

from __future__ import annotations

import bisect
import functools
import math
from collections import deque
from collections.abc import Mapping, Sequence
from typing import Any

from monitor.analysis.waveform import ReadingAnalysis
from monitor.detection.alarms import AlarmEngine, AlarmKey, Transition
from monitor.detection.features import growth_orders, reading_features
from monitor.detection.growth import Baseline, TrendWindow, fit_due_windows
from monitor.detection.health import HealthReport, check_waveform, is_stale
from monitor.detection.margins import (
    ApproachForecast,
    MarginGrid,
    MarginRow,
    MarginRows,
    MarginState,
    approach_forecasts,
    speed_is_steady,
)
from monitor.detection.results import (
    _LEVELS,
    _READY,
    FeatureEvaluation,
    FeatureRows,
    ReadingEvaluation,
)
from monitor.detection.state_json import (
    STATE_FORMAT,
    float_in,
    float_out,
    floats_in,
    floats_out,
    upgrade_snapshot,
)
from monitor.detection.zones import ZoneLimits, zone_limits, zone_of
from monitor.model.bounds import check_machine
from monitor.model.detection_settings import DetectionSettings
from monitor.model.readings import SpeedReading, Waveform
from monitor.model.registry import Machine
from monitor.modes.shift import ModeShift

#: Why an alarm closes when what it watches leaves the registry: the ``reason`` of its
#: ``cleared`` transition's evidence (docs/alarms.md, "Alarms of what leaves the registry").
MODE_REMOVED = "mode removed from the registry"
EXCITATION_REMOVED = "excitation removed from the registry"
POINT_RETIRED = "point retired from the registry"
MACHINE_RETIRED = "machine retired from the registry"

#: Severity of each sensor-health check (docs/alarms.md).
SENSOR_FAULT_SEVERITY = {
    "flat_line": "alert", "clipping": "alert", "dropouts": "alert", "stale": "alert",
    "sample_rate": "alert", "unit": "alert", "spikes": "advisory",
}


def validate_machine(machine: Machine) -> DetectionSettings:
    """Check what detection relies on (the registry's bounds, :func:`monitor.model.bounds.
    check_machine`); ValueError naming the machine, entry and field.

    Returns the machine's :class:`DetectionSettings`.
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
        self._h = s.hysteresis_pct / 100.0
        self._baselines: dict[tuple[str, str], Baseline] = {}
        self._trends: dict[tuple[str, str], TrendWindow] = {}
        self._ignored: dict[str, dict[str, int]] = {}
        self._speed: deque[tuple[float, float]] = deque(maxlen=s.speed_history)
        self._last_ts: dict[str, float] = {}
        self._intervals: dict[str, deque[float]] = {}
        self._keys: dict[tuple[str | None, str, str], AlarmKey] = {}
        self._orders = growth_orders(machine)
        # Per point: feature name -> (baseline, trend window, alarm key), the same objects
        # as in _baselines/_trends, so a reading finds all three with one lookup.
        self._slots: dict[str, dict[str, tuple[Baseline, TrendWindow, AlarmKey]]] = {}
        self._ratio_limits = tuple((float(r), f"{r:g}x baseline") for r in s.growth_ratios)
        self._grid = MarginGrid(machine, approach_factor=s.approach_factor,
                                machine_default_pct=s.required_margin_pct)
        self._res_seen: set[int] = set()  # margin rows that ever fed the alarm engine
        self._res_order: list[int] = []  # the same, ascending
        self._growth_fed: set[AlarmKey] = set()  # growth keys that ever fed the engine
        self._fault_seen: set[str] = set()  # points whose block checks ever fed the engine
        # Whether every open alarm is known to fit this registry entry (a fresh evaluator
        # has none; a restored one is checked by close_orphaned_alarms).
        self._orphans_checked = True
        # Excitation frequencies (Hz) between which each (mode, excitation) pair can be
        # near its band (margin inside the approach band with hysteresis), widened by a
        # part in 10^9 so rounding never hides a pair (a stray candidate only costs the
        # exact computation); readings whose excitations lie
        # outside every such window skip the margin arrays altogether.
        g = self._grid
        widest = g.approach_factor * (1.0 + self._h) / 100.0 * (1.0 + 1e-9)
        self._near_lo = g.mode_hz * (1.0 - g.req_above * widest - 1e-9)
        self._near_hi = g.mode_hz * (1.0 + g.req_below * widest + 1e-9)
        # Per flat pair (mode-major): mode Hz, order, fixed Hz, required % below/above.
        self._pairs = [(float(g.mode_hz[i, 0]), float(g.order_arr[j]), float(g.fixed_arr[j]),
                        float(g.req_below[i, 0]), float(g.req_above[i, 0]))
                       for i in range(len(g.modes)) for j in range(g.n_exc)]
        # The same windows as running-speed intervals, widened again by a part in 10^9:
        # between two consecutive interval ends the candidate set does not change, so a
        # reading finds its candidates by one bisection instead of array arithmetic.
        always: list[int] = []
        spans: list[tuple[float, float, int]] = []
        for k, (_, order, fixed, _, _) in enumerate(self._pairs):
            lo = float(self._near_lo[k // g.n_exc, 0])
            hi = float(self._near_hi[k // g.n_exc, 0])
            if order == 0.0:
                if lo < fixed < hi:
                    always.append(k)
                continue
            a, b = (lo - fixed) / order, (hi - fixed) / order
            spans.append((a - 1e-9 * abs(a) - 1e-12, b + 1e-9 * abs(b) + 1e-12, k))
        self._res_keys = [self._key(None, "resonance_proximity", subj) for subj in g.subjects]
        self._res_index = {subj: k for k, subj in enumerate(g.subjects)}
        self._pair_zetas = [g.zetas[k // g.n_exc] for k in range(len(self._pairs))]
        self._cand_edges = sorted({e for a, b, _ in spans for e in (a, b)})
        edges = [-math.inf, *self._cand_edges, math.inf]
        self._cand_sets = [
            sorted(always + [k for a, b, k in spans if a <= edges[i] and b >= edges[i + 1]])
            for i in range(len(edges) - 1)]
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
        inside: list[str] = []
        if speed is not None and math.isfinite(speed) and speed > 0:
            if not suppressed:
                inside, approach, t = self._speed_value(ts, speed, rid)
                trans += t
            margins = MarginRows(self._grid, speed_hz=speed)

        overall = zone = None
        feats: Sequence[FeatureEvaluation] = ()
        ignored: str | None = None
        if analysis is not None:
            overall = float(analysis.overall_velocity_mm_s_rms)
            zone = zone_of(overall, limits) if math.isfinite(overall) and overall >= 0 else None
            if not health.ok:
                ignored = "sensor fault: " + ", ".join(health.checks)
            elif inside:
                    ignored = "resonance band: " + ", ".join(inside)
            feats, t = self._growth(analysis, point.id, limits, ignored)
            trans += t
        # Every field set at once, past the frozen dataclass's __init__ (one
        # object.__setattr__ per field, a measurable part of a reading's detection).
        out = object.__new__(ReadingEvaluation)
        out.__dict__.update(
            machine=self.machine.id, point=point.id, ts=ts, reading_id=rid, speed_hz=speed,
            overall_velocity_mm_s_rms=overall, zone=zone, zone_limits=limits, margins=margins,
            approach=approach, features=feats, health=health, growth_ignored=ignored,
            machine_alarms_suppressed=suppressed, transitions=tuple(trans),
        )
        return out

    def observe_speed(self, reading: SpeedReading) -> list[Transition]:
        """A running-speed message (Hz) for this machine; advances resonance alarms."""
        if reading.machine != self.machine.id:
            raise ValueError(f"speed is for machine {reading.machine!r}, this evaluator is for {self.machine.id!r}.")
        sp = float(reading.speed_hz)
        if not (math.isfinite(sp) and sp > 0):
            raise ValueError(f"speed_hz must be a positive finite speed, got {reading.speed_hz!r}.")
        return self._speed_value(float(reading.ts), sp, None)[2]

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
            level = None
            if f.status == "shifted":
                level = "alert" if abs(f.shift_pct or 0.0) > 2.0 * f.tolerance_pct else "advisory"
            ev = {**f.to_json(), **(evidence or {})}
            out += self.engine.update(self._key(point, "mode_shift", f.mode), float(ts), level, level, ev,
                                      None, persistence=1)
        return out

    def margins_at(self, speed_hz: float) -> tuple[MarginRow, ...]:
        """The margin table at any running speed (Hz), e.g. for a resonance map."""
        return self._grid.rows(self._grid.compute(speed_hz))

    def check_stale(self, now: float) -> list[Transition]:
        """Raise ``sensor_fault``/``stale`` for points silent for ``stale_intervals``
        expected intervals at time ``now`` (epoch seconds); cleared by the next reading."""
        out: list[Transition] = []
        for pid, last in sorted(self._last_ts.items()):
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
        for (pid, name), b in list(self._baselines.items()):
            if pid == point_id and (feature is None or name == feature):
                b.restart(ts)
                self._trends[(pid, name)].clear()

    def active_alarms(self) -> list[dict]:
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
            if key.subject in self._res_index:
                return None
            mode = key.subject.rpartition("@")[0]
            return EXCITATION_REMOVED if any(m.name == mode for m in self.machine.modes) else MODE_REMOVED
        if key.kind == "mode_shift":
            return None if any(m.name == key.subject for m in self.machine.modes) else MODE_REMOVED
        if key.kind == "amplitude_growth":
            # An order feature of an order no longer excited; the fixed features and the
            # bearing lines (present as the analysis finds them) stay.
            name = key.subject
            if name.endswith("x") and name not in ("1x", *(n for _, n in self._orders)):
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

    def snapshot(self) -> dict:
        """JSON-able state of this machine's detection, exact to the bit: non-finite
        floats as tagged strings (:mod:`monitor.detection.state_json`), format
        :data:`~monitor.detection.state_json.STATE_FORMAT` (docs/store.md)."""
        speed = [list(x) for x in self._speed]
        if not math.isfinite(sum(t + v for t, v in self._speed)):  # rare: tag what is not finite
            speed = [floats_out(x) for x in self._speed]
        return {
            "format": STATE_FORMAT,
            "machine": self.machine.id,
            "engine": self.engine.snapshot(),
            "baselines": [[p, f, b.snapshot()] for (p, f), b in self._baselines.items()],
            "trends": [[p, f, w.snapshot()] for (p, f), w in self._trends.items()],
            "ignored": {p: dict(c) for p, c in self._ignored.items()},
            "speed": speed,
            "last_ts": {p: float_out(t) for p, t in self._last_ts.items()},
            "intervals": {p: floats_out(d) for p, d in self._intervals.items()},
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
        for p, f, b in data.get("baselines", []):
            ev._baselines[(p, f)] = Baseline.restore(b)
        for p, f, w in data.get("trends", []):
            ev._trends[(p, f)] = TrendWindow.restore(w)
        ev._ignored = {p: dict(c) for p, c in data.get("ignored", {}).items()}
        ev._speed.extend(tuple(floats_in(x)) for x in data.get("speed", []))
        points = ev._limits
        ev._last_ts = {p: float_in(t) for p, t in data.get("last_ts", {}).items() if p in points}
        ev._intervals = {p: deque(floats_in(v), maxlen=10) for p, v in data.get("intervals", {}).items()
                         if p in points}
        index = ev._res_index
        ev._fault_seen = {k.point for k in ev.engine.alarm_keys()
                          if k.kind == "sensor_fault" and k.subject != "stale" and k.point is not None}
        ev._res_seen = {index[k.subject] for k in ev.engine.alarm_keys()
                        if k.kind == "resonance_proximity" and k.subject in index}
        ev._res_order = sorted(ev._res_seen)
        ev._growth_fed = {k for k in ev.engine.alarm_keys() if k.kind == "amplitude_growth"}
        ev._orphans_checked = not ev.engine.active()
        return ev

    # ------------------------------------------------------------------ internals

    def _key(self, point: str | None, kind: str, subject: str) -> AlarmKey:
        k = (point, kind, subject)
        key = self._keys.get(k)
        if key is None:
            key = self._keys[k] = AlarmKey(self.machine.id, point, kind, subject)
        return key

    def _slot(self, pid: str, name: str, speed_band: float | None
              ) -> tuple[Baseline, TrendWindow, AlarmKey]:
        """The baseline, trend window and growth alarm key of one feature of a point,
        made on the feature's first reading (or taken from a restored snapshot)."""
        s = self.settings
        k = (pid, name)
        base = self._baselines.get(k)
        if base is None:
            base = self._baselines[k] = Baseline(s.baseline_readings)
        win = self._trends.get(k)
        if win is None:
            win = self._trends[k] = TrendWindow(
                s.trend_window, s.trend_min_readings, s.trend_refit_every, speed_band)
        return base, win, self._key(pid, "amplitude_growth", name)

    def _expected_interval(self, pid: str) -> float | None:
        if self.settings.reading_interval_s is not None:
            return self.settings.reading_interval_s
        d = self._intervals.get(pid)
        if not d or len(d) < 3:
            return None
        return sorted(d)[len(d) // 2]

    def _arrival(self, pid: str, ts: float, rid: str | None) -> list[Transition]:
        last = self._last_ts.get(pid)
        if last is None:
            self._last_ts[pid] = ts
        elif ts > last:
            d = self._intervals.get(pid)
            if d is None:
                d = self._intervals[pid] = deque(maxlen=10)
            d.append(ts - last)
            self._last_ts[pid] = ts
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
            lvl = sev if f is not None else None
            ev = {"check": check, "message": f.message if f else "check passes",
                  "value": f.value if f else None, "reading_id": rid}
            out += self.engine.update(key, ts, lvl, lvl, ev, rid)
        return out

    def _pair(self, k: int, speed: float) -> tuple[float, float, float, float]:
        """(margin %, required %, approach %, frequency ratio) of flat pair ``k``: the
        arithmetic of :meth:`MarginGrid.compute` on one pair (same IEEE operations, so
        the same numbers)."""
        fm, order, fixed, rb, ra = self._pairs[k]
        exc = order * speed + fixed
        rq = rb if fm <= exc else ra
        return abs(exc - fm) / fm * 100.0, rq, rq * self._grid.approach_factor, exc / fm

    def _speed_value(self, ts: float, speed: float, rid: str | None
                     ) -> tuple[list[str], tuple[ApproachForecast, ...], list[Transition]]:
        """Resonance alarms at a new speed value: (subjects with an excitation inside
        their required band, approach forecasts, transitions)."""
        grid = self._grid
        h1 = 1.0 + self._h
        inside: list[str] = []
        near: dict[int, tuple[float, float, float, float]] = {}
        pairs = self._pairs
        af = grid.approach_factor
        # The pairs whose excitation lies in the (widened) window where it can be near its
        # band; every other pair holds no condition at this speed.
        for k in self._cand_sets[bisect.bisect_right(self._cand_edges, speed)]:
            # _pair(k, speed), inlined (the same operations).
            fm, order, fixed, rb, ra = pairs[k]
            exc = order * speed + fixed
            rq = rb if fm <= exc else ra
            m = abs(exc - fm) / fm * 100.0
            ap = rq * af
            if rq > 0 and m < ap * h1:
                near[k] = (m, rq, ap, exc / fm)
                if m < rq:
                    inside.append(grid.subjects[k])
        if self._speed and ts <= self._speed[-1][0]:
            return inside, (), []  # the same instant seen from another point: count it once
        self._speed.append((ts, speed))
        s = self.settings
        approach: tuple[ApproachForecast, ...] = ()
        # A steady speed has no ramp to forecast (approach_forecasts' own first test, on
        # the speeds alone: most readings stop here).
        if len(self._speed) >= 5 and not speed_is_steady([p[1] for p in self._speed]):
            t, v = zip(*self._speed, strict=True)
            approach = tuple(a for a in approach_forecasts(
                self.machine, t, v, machine_default_pct=s.required_margin_pct)
                if a.seconds <= s.approach_warning_s * h1)
        soon = {a.subject: a for a in approach}
        # Only rows near a band, forecast to enter one, or with alarm history need the
        # engine; the rest hold no condition and have nothing to count.
        if soon or not near.keys() <= self._res_seen:
            self._res_seen |= near.keys()
            if soon:
                self._res_seen |= {k for k, subj in enumerate(grid.subjects) if subj in soon}
            self._res_order = sorted(self._res_seen)
        out: list[Transition] = []
        state: list[MarginState] = []  # the arrays, built only for a transition's evidence
        update = self.engine.update_ranked
        warn_s = s.approach_warning_s
        for k in self._res_order:
            key = self._res_keys[k]
            p = near.get(k)
            m, rq, ap, ratio = p if p is not None else self._pair(k, speed)
            if rq <= 0:
                out += update(key, ts, 0, 0, {"reason": "no margin required"}, rid)
                continue
            fc = soon.get(key.subject) if soon else None
            # Ranks as severity_rank: 1 advisory, 2 alert, 3 severe.
            r = hl = 0
            if fc is not None:
                hl = 1
                if fc.seconds <= warn_s:
                    r = 1
            if m < ap:
                r = 1
            if m < ap * h1:
                hl = 1
            if m < rq:
                r = 2
            if m < rq * h1:
                hl = 2
                # Inside the half-power band the excitation sits on the resonance peak.
                zeta = self._pair_zetas[k]
                if zeta is not None:
                    dev = abs(ratio - 1.0)
                    if m < rq and dev <= zeta:
                        r = 3
                    if dev <= zeta * h1:
                        hl = 3
            out += update(key, ts, r, hl,
                          functools.partial(_resonance_evidence, speed, rid, grid, state, k, fc), rid)
        return inside, approach, out

    def _growth(self, analysis: ReadingAnalysis, pid: str, limits: ZoneLimits, ignored: str | None
                ) -> tuple[FeatureRows, list[Transition]]:
        s = self.settings
        h = self._h
        horizon_s = s.trend_horizon_days * 86400.0
        ts = float(analysis.ts)
        speed = float(analysis.speed_hz)
        rid = analysis.reading_id
        counts = self._ignored.setdefault(pid, {})
        if ignored is not None:
            reason = ignored.split(":")[0]
            counts[reason] = counts.get(reason, 0) + 1
        band = s.baseline_speed_band_pct / 100.0
        slots = self._slots.get(pid)
        if slots is None:
            slots = self._slots[pid] = {}
        rows = []
        due_fits: list[TrendWindow] = []
        for name, value, unit, speed_dep in reading_features(analysis, self.machine, self._orders):
            if not (0.0 <= value < math.inf):  # finite and not negative (NaN fails too)
                continue
            slot = slots.get(name)
            if slot is None:
                slot = slots[name] = self._slot(pid, name, band if speed_dep else None)
            base, win, key = slot
            comparable = True
            if ignored is None:
                if base.stats is None:
                    base.add(value, speed, ts)
                bs = base.speed_hz
                comparable = not (speed_dep and bs and abs(speed - bs) > band * bs)
                if win.add(ts, value, speed):
                    due_fits.append(win)
            rows.append((name, value, unit, base, win, comparable, key))
        if due_fits:
            fit_due_windows(due_fits)
        # Levels are decided here on plain floats; the FeatureEvaluation objects (and their
        # words) are built only when something reads them (FeatureRows, a transition's
        # evidence): most readings' features are never looked at.
        r_adv, r_alert = s.growth_ratios
        hold = 1.0 - h
        r_adv_hold, r_alert_hold = r_adv * hold, r_alert * hold
        ab, bc, cd = limits.ab, limits.bc, limits.cd
        bc_hold, cd_hold = bc * hold, cd * hold
        sigmas = s.baseline_sigmas
        horizon_hold = horizon_s * (1 + h)
        specs: list[tuple] = []
        alarm = self.engine.alarm
        fed = self._growth_fed
        due: list[tuple[int, AlarmKey, int, int]] = []
        ratio_limits = self._ratio_limits
        for name, value, unit, base, win, comparable, key in rows:
            st = base.stats
            if st is None:
                status: tuple = ("learning", len(base.values), base.size)
                ratio = None
            elif not comparable:
                status = ("speed", speed, base.speed_hz)
                ratio = None
            else:
                status = _READY
                med = st.median
                ratio = value / med if med > 0 else None
            line = win.line() if ignored is None else None
            # (raise rank, hold rank) from each rule; the worst of each wins. Ranks as
            # severity_rank: 1 advisory, 2 alert, 3 severe.
            rr = hr = 0
            causes: list[tuple] = []
            # Next limit: zone boundary for the overall level, baseline ratio limit otherwise.
            lim_name = lim_val = None
            if name == "overall":
                if value <= ab:
                    lim_name, lim_val, zr = "A/B", ab, 1
                elif value <= bc:
                    lim_name, lim_val, zr = "B/C", bc, 2
                elif value <= cd:
                    lim_name, lim_val, zr = "C/D", cd, 3
                else:
                    zr = 4
                # Raise by the zone itself (a zone includes its upper boundary); hold by
                # levels_above(value, {alert: B/C, severe: C/D}, h).
                rr = 2 if zr == 3 else 3 if zr == 4 else 0
                hr = 3 if value >= cd_hold else 2 if value >= bc_hold else 0
                if rr or hr:
                    causes.append(("zone", "ABCD"[zr - 1], value))
            elif ratio is not None:
                for r, r_name in ratio_limits:
                    if value < r * med:
                        lim_name, lim_val = r_name, r * med
                        break
            ttl = None
            if line is not None and lim_val is not None:
                # time_to_limit on the carried-forward line (same arithmetic).
                slope, low, fitted = line
                if fitted >= lim_val:
                    ttl = 0.0
                elif low > 0.0 and slope > 0:
                    ttl = (lim_val - fitted) / slope
            if ratio is not None:
                r = 2 if ratio >= r_alert else 1 if ratio >= r_adv else 0
                hl = 2 if ratio >= r_alert_hold else 1 if ratio >= r_adv_hold else 0
                if r and value <= med + sigmas * st.sigma:
                    r = 0  # within the baseline's own scatter
                if r or hl:
                    causes.append(("ratio", ratio))
                    rr, hr = max(rr, r), max(hr, hl)
            # Trend: only towards limits that matter (B/C and C/D, or a ratio limit).
            if ttl is not None and lim_name != "A/B" and ttl <= horizon_hold:
                r = 1 if ttl <= horizon_s else 0
                causes.append(("trend", lim_name, ttl))
                rr, hr = max(rr, r), max(hr, 1)
            specs.append((name, value, unit, st, status, ratio,
                          None if line is None else line[0] * 86400.0,
                          lim_name, lim_val, ttl, _LEVELS[rr], _LEVELS[hr], causes))
            # A key that never fed the engine has no alarm to count down.
            if ignored is None and (rr or hr or (key in fed and alarm(key) is not None)):
                due.append((len(specs) - 1, key, rr, hr))
                fed.add(key)
        feats = FeatureRows(specs)
        out: list[Transition] = []
        for i, key, rr, hr in due:
            out += self.engine.update_ranked(
                key, ts, rr, hr,
                functools.partial(_growth_evidence, rid, speed, limits, feats, i, counts), rid)
        if out:
            counts.clear()  # reported in these transitions' evidence
        return feats, out



_NO_MARGINS = MarginRows()


def _resonance_evidence(speed: float, rid: str | None, grid: MarginGrid, state: list[MarginState],
                        k: int, fc: ApproachForecast | None) -> dict[str, Any]:
    if not state:
        state.append(grid.compute(speed))
    ev = {"speed_hz": speed, "reading_id": rid, **grid.row(state[0], k).to_json()}
    if fc is not None:
        ev["approach"] = fc.to_json()
    return ev


def _growth_evidence(rid: str | None, speed: float, limits: ZoneLimits, feats: FeatureRows, i: int,
                     counts: dict[str, int]) -> dict[str, Any]:
    return {"reading_id": rid, "speed_hz": speed, "zone_limits_mm_s": list(limits.as_tuple()),
            **feats[i].to_json(), "ignored_readings": dict(counts)}
