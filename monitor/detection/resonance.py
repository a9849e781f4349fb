"""Resonance-proximity alarms of one machine, advanced at every new running-speed value.

At each speed, the (mode, excitation) pairs whose separation margin
(:mod:`monitor.detection.margins`, API 684) lies inside the approach band or the required
band, and those a ramping speed will bring into a required band soon
(:mod:`monitor.detection.approach`), give the alarm engine their levels; the alarm subject
is ``'<mode>@<excitation>'``, per machine (no point). Levels (docs/alarms.md):

- advisory: margin inside the approach band (approach factor x required margin), or a
  ramp forecast to enter the required band within ``approach_warning_s``;
- alert: margin inside the required band;
- severe: inside the required band with the excitation inside the mode's half-power band
  (``|f_exc / f_mode - 1| <= zeta``), on the resonance peak itself.

Each level holds (hysteresis) until the margin leaves its band widened by
``hysteresis_pct`` percent (the forecast's time likewise).

Transients are not alarmed (:mod:`monitor.detection.dwell`): a level is raised only once
the excitation has stayed in that level's band for ``resonance_dwell_s``, and a forecast
counts only for a ramp slow enough to take that long to cross the required band. A run-up
or coast-down passing through a band raises nothing; readings taken during such a sweep
are named (:attr:`SpeedOutcome.sweeping`) so that growth leaves them out.
"""

from __future__ import annotations

import bisect
import functools
import math
from collections import deque
from collections.abc import Iterable
from typing import Any, NamedTuple

from monitor.detection.alarms import AlarmEngine, AlarmKey, AlarmKind, Transition
from monitor.detection.approach import ApproachForecast, approach_forecasts, speed_is_steady
from monitor.detection.dwell import BandStay
from monitor.detection.margins import MarginGrid, MarginRows, MarginState, PairMargin
from monitor.model.detection_settings import DetectionSettings
from monitor.model.registry import Machine

#: Alarm kind of this module's alarms.
KIND: AlarmKind = "resonance_proximity"


class SpeedOutcome(NamedTuple):
    """What a new speed value did: the subjects whose excitation is sweeping through their
    required band (:meth:`monitor.detection.dwell.BandStay.sweeping`), the approach
    forecasts within the warning time, the alarm transitions, and the subjects whose
    required band holds 1x at that speed."""

    sweeping: list[str]
    approach: tuple[ApproachForecast, ...]
    transitions: list[Transition]
    one_x_inside: tuple[str, ...] = ()


def margin_ranks(margin: PairMargin, zeta: float | None, hysteresis: float) -> tuple[int, int]:
    """``(raise rank, hold rank)`` of one pair's margin (:func:`~monitor.detection.alarms.severity_rank`:
    0 none, 1 advisory, 2 alert, 3 severe) by the bands of the module docstring, before
    any dwell or forecast.

    ``margin`` at the current speed (a required margin above 0); ``zeta`` the mode's
    damping ratio (None when unknown: no severe); ``hysteresis`` a fraction.
    """
    widen = 1.0 + hysteresis
    margin_pct, required_pct, approach_pct, frequency_ratio = margin
    raise_rank = hold_rank = 0
    if margin_pct < approach_pct:
        raise_rank = 1
    if margin_pct < approach_pct * widen:
        hold_rank = 1
    if margin_pct < required_pct:
        raise_rank = 2
    if margin_pct < required_pct * widen:
        hold_rank = 2
        if zeta is not None:
            off_peak = abs(frequency_ratio - 1.0)
            if margin_pct < required_pct and off_peak <= zeta:
                raise_rank = 3
            if off_peak <= zeta * widen:
                hold_rank = 3
    return raise_rank, hold_rank


def forecast_ranks(forecast_s: float | None, warning_s: float) -> tuple[int, int]:
    """``(raise rank, hold rank)`` of a ramp forecast: advisory raised when the ramp brings
    the excitation into the required band within ``warning_s`` seconds, held while any
    forecast (within the warning time lengthened by the hysteresis) is given
    (``forecast_s`` None: none)."""
    if forecast_s is None:
        return 0, 0
    return (1 if forecast_s <= warning_s else 0), 1


class ResonanceWatch:
    """The resonance-proximity state of one machine: its margin grid, the latest speed
    values (for the ramp forecast) and which pairs have ever fed the alarm engine.

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
        self.hysteresis = settings.hysteresis_pct / 100.0
        self.grid = MarginGrid(machine, approach_factor=settings.approach_factor,
                               machine_default_pct=settings.required_margin_pct)
        g = self.grid
        #: (epoch s, Hz) of the latest speed values, oldest first.
        self.speeds: deque[tuple[float, float]] = deque(maxlen=settings.speed_history)
        #: The stays of the pairs inside a band, by pair index.
        self.stays: dict[int, BandStay] = {}
        #: False after a restore from a snapshot that kept no stays: the next speed value
        #: is then taken as the first one seen (no entry into a band is known).
        self.entries_known = True
        self.keys = [AlarmKey(machine.id, None, KIND, subject) for subject in g.subjects]
        self.index = {subject: k for k, subject in enumerate(g.subjects)}
        self.zetas = [g.zetas[k // g.n_exc] for k in range(len(g.pairs))]
        self._seen: set[int] = set()  # pairs that ever fed the alarm engine
        self._seen_order: list[int] = []  # the same, ascending
        self._edges, self._candidates = self._candidate_sets()

    def _candidate_sets(self) -> tuple[list[float], list[list[int]]]:
        """Running-speed interval ends (Hz, ascending) and, for each interval between two
        of them, the pairs that can be near their band there.

        A pair can be near its band (margin inside the approach band with hysteresis) only
        while its excitation lies in a window around the mode; the windows are widened by a
        part in 10^9 so that rounding never hides a pair (a stray candidate only costs the
        exact computation), and again as speed intervals. Between two consecutive ends the
        candidate set does not change, so a speed finds its candidates by one bisection.
        """
        g = self.grid
        widest = g.approach_factor * (1.0 + self.hysteresis) / 100.0 * (1.0 + 1e-9)
        near_lo = g.mode_hz * (1.0 - g.req_above * widest - 1e-9)
        near_hi = g.mode_hz * (1.0 + g.req_below * widest + 1e-9)
        always: list[int] = []
        spans: list[tuple[float, float, int]] = []
        for k, pair in enumerate(g.pairs):
            lo = float(near_lo[k // g.n_exc, 0])
            hi = float(near_hi[k // g.n_exc, 0])
            if pair.order == 0.0:
                if lo < pair.fixed_hz < hi:
                    always.append(k)
                continue
            a, b = (lo - pair.fixed_hz) / pair.order, (hi - pair.fixed_hz) / pair.order
            spans.append((a - 1e-9 * abs(a) - 1e-12, b + 1e-9 * abs(b) + 1e-12, k))
        ends = sorted({e for a, b, _ in spans for e in (a, b)})
        bounds = [-math.inf, *ends, math.inf]
        sets = [sorted(always + [k for a, b, k in spans if a <= bounds[i] and b >= bounds[i + 1]])
                for i in range(len(bounds) - 1)]
        return ends, sets

    def rows(self, speed_hz: float) -> MarginRows:
        """The margin table at ``speed_hz`` (Hz), built when read."""
        return MarginRows(self.grid, speed_hz=speed_hz)

    def restore(self, keys: Iterable[AlarmKey]) -> None:
        """Mark the pairs with an alarm history among ``keys`` (a restored engine's) as fed."""
        self._seen = {self.index[k.subject] for k in keys if k.kind == KIND and k.subject in self.index}
        self._seen_order = sorted(self._seen)

    def stays_snapshot(self) -> dict[str, list[Any]]:
        """The stays as exact JSON data, by subject, in pair order."""
        return {self.grid.subjects[k]: self.stays[k].snapshot() for k in sorted(self.stays)}

    def restore_stays(self, data: dict[str, list[Any]] | None) -> None:
        """Take the stays of :meth:`stays_snapshot` (subjects no longer in the registry
        entry are dropped); None (a snapshot that kept none) makes the next speed value
        count as the first one seen."""
        self.entries_known = data is not None
        self.stays = {self.index[subject]: BandStay.restore(v) for subject, v in (data or {}).items()
                      if subject in self.index}

    def stopped(self) -> None:
        """The machine is standing still (speed 0): every stay in a band ends."""
        self.stays.clear()

    def sweeping(self, ts: float) -> list[str]:
        """The subjects whose excitation is sweeping through their required band at ``ts``
        (epoch s), in pair order."""
        dwell_s = self.settings.resonance_dwell_s
        return [self.grid.subjects[k] for k in sorted(self.stays) if self.stays[k].sweeping(ts, dwell_s)]

    def at_speed(self, engine: AlarmEngine, ts: float, speed_hz: float, reading_id: str | None
                 ) -> SpeedOutcome:
        """Advance the alarms of ``engine`` at a new speed value (epoch s, Hz > 0).

        A value whose time is not later than the last one's (the same instant seen from
        another point) gives the subjects sweeping through a band but counts nothing
        again.
        """
        grid = self.grid
        widen = 1.0 + self.hysteresis
        near: dict[int, PairMargin] = {}
        one_x: list[str] = []
        # Every pair outside the candidates holds no condition at this speed.
        for k in self._candidates[bisect.bisect_right(self._edges, speed_hz)]:
            margin = grid.pair(k, speed_hz)
            if margin.required_pct > 0 and margin.margin_pct < margin.approach_pct * widen:
                near[k] = margin
                if margin.margin_pct < margin.required_pct and grid.pairs[k].order == 1.0:
                    one_x.append(grid.subjects[k])
        if self.speeds and ts <= self.speeds[-1][0]:
            return SpeedOutcome(self.sweeping(ts) if self.stays else [], (), [], tuple(one_x))
        entry_seen = self.entries_known and bool(self.speeds)
        self.entries_known = True
        self.speeds.append((ts, speed_hz))
        approach = self._forecasts()
        dwell_s = self.settings.resonance_dwell_s
        # A ramp that crosses the band faster than the dwell is a passage, not a warning.
        soon = {a.subject: a for a in approach if a.crossing_s >= dwell_s}
        # Only pairs near a band, forecast to enter one, or with alarm history need the
        # engine; the rest hold no condition and have nothing to count.
        if soon or not near.keys() <= self._seen:
            self._seen |= near.keys()
            if soon:
                self._seen |= {k for k, subject in enumerate(grid.subjects) if subject in soon}
            self._seen_order = sorted(self._seen)
        out: list[Transition] = []
        state: list[MarginState] = []  # the arrays, built only for a transition's evidence
        warning_s = self.settings.approach_warning_s
        stays = self.stays
        sweeping: list[str] = []
        for k in self._seen_order:
            key = self.keys[k]
            known = near.get(k)
            margin = known if known is not None else grid.pair(k, speed_hz)
            if margin.required_pct <= 0:
                out += engine.update_ranked(key, ts, 0, 0, {"reason": "no margin required"}, reading_id)
                continue
            # Only a pair near its band holds a level by its margin (near is that test).
            raise_rank, hold_rank = (0, 0) if known is None else margin_ranks(margin, self.zetas[k], self.hysteresis)
            stay = stays.get(k)
            if hold_rank or stay is not None:
                if stay is None:
                    stay = stays[k] = BandStay()
                raise_rank = stay.advance(ts, raise_rank, hold_rank, entry_seen, dwell_s)
                if raise_rank < 0:  # outside every band
                    del stays[k]
                    stay = None
                    raise_rank = 0
                elif stay.crossed and stay.sweeping(ts, dwell_s):
                    sweeping.append(key.subject)
            forecast = soon.get(key.subject) if soon else None
            if forecast is not None:
                f_raise, f_hold = forecast_ranks(forecast.seconds, warning_s)
                raise_rank, hold_rank = max(raise_rank, f_raise), max(hold_rank, f_hold)
            evidence = functools.partial(_evidence, speed_hz, reading_id, grid, state, k, forecast, stay, ts, dwell_s)
            out += engine.update_ranked(key, ts, raise_rank, hold_rank, evidence, reading_id)
        return SpeedOutcome(sweeping, approach, out, tuple(one_x) if one_x else ())

    def _forecasts(self) -> tuple[ApproachForecast, ...]:
        """The ramp forecasts within the warning time (with hysteresis) from the latest
        speeds; none for fewer than 5 speeds or a steady speed (most readings stop at
        this test on the speeds alone)."""
        s = self.settings
        if len(self.speeds) < 5 or speed_is_steady([v for _, v in self.speeds]):
            return ()
        t, v = zip(*self.speeds, strict=True)
        return tuple(a for a in approach_forecasts(self.machine, t, v, machine_default_pct=s.required_margin_pct)
                     if a.seconds <= s.approach_warning_s * (1.0 + self.hysteresis))


def _evidence(speed_hz: float, reading_id: str | None, grid: MarginGrid, state: list[MarginState],
              k: int, forecast: ApproachForecast | None, stay: BandStay | None, ts: float, dwell_s: float
              ) -> dict[str, Any]:
    """A transition's evidence at ``ts`` (epoch s): the pair's margin row (the grid's arrays
    computed once per speed, kept in ``state``), how long the excitation has stayed in its
    innermost band (``dwell_s``, None outside every band) against the dwell a raise needs
    (``required_dwell_s``), and its forecast."""
    if not state:
        state.append(grid.compute(speed_hz))
    out = {"speed_hz": speed_hz, "reading_id": reading_id, **grid.row(state[0], k).to_json(),
           "dwell_s": None if stay is None else stay.seconds_in(ts), "required_dwell_s": dwell_s}
    if forecast is not None:
        out["approach"] = forecast.to_json()
    return out
