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
from monitor.detection.margins import MarginGrid, MarginRows, MarginState, PairMargin
from monitor.model.detection_settings import DetectionSettings
from monitor.model.registry import Machine

#: Alarm kind of this module's alarms.
KIND: AlarmKind = "resonance_proximity"


class SpeedOutcome(NamedTuple):
    """What a new speed value did: the subjects with an excitation inside their required
    band, the approach forecasts within the warning time, and the alarm transitions."""

    inside: list[str]
    approach: tuple[ApproachForecast, ...]
    transitions: list[Transition]


def pair_ranks(margin: PairMargin, zeta: float | None, forecast_s: float | None, warning_s: float,
               hysteresis: float) -> tuple[int, int]:
    """``(raise rank, hold rank)`` of one pair (:func:`~monitor.detection.alarms.severity_rank`:
    0 none, 1 advisory, 2 alert, 3 severe) by the levels of the module docstring.

    ``margin`` at the current speed (a required margin above 0); ``zeta`` the mode's
    damping ratio (None when unknown: no severe); ``forecast_s`` seconds until a ramp
    brings the excitation into the required band (None without such a forecast);
    ``warning_s`` the advisory's warning time (s); ``hysteresis`` a fraction.
    """
    widen = 1.0 + hysteresis
    margin_pct, required_pct, approach_pct, frequency_ratio = margin
    raise_rank = hold_rank = 0
    if forecast_s is not None:
        hold_rank = 1
        if forecast_s <= warning_s:
            raise_rank = 1
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

    def at_speed(self, engine: AlarmEngine, ts: float, speed_hz: float, reading_id: str | None
                 ) -> SpeedOutcome:
        """Advance the alarms of ``engine`` at a new speed value (epoch s, Hz > 0).

        A value whose time is not later than the last one's (the same instant seen from
        another point) gives the subjects inside their band but counts nothing again.
        """
        grid = self.grid
        widen = 1.0 + self.hysteresis
        inside: list[str] = []
        near: dict[int, PairMargin] = {}
        # Every pair outside the candidates holds no condition at this speed.
        for k in self._candidates[bisect.bisect_right(self._edges, speed_hz)]:
            margin = grid.pair(k, speed_hz)
            if margin.required_pct > 0 and margin.margin_pct < margin.approach_pct * widen:
                near[k] = margin
                if margin.margin_pct < margin.required_pct:
                    inside.append(grid.subjects[k])
        if self.speeds and ts <= self.speeds[-1][0]:
            return SpeedOutcome(inside, (), [])
        self.speeds.append((ts, speed_hz))
        approach = self._forecasts()
        soon = {a.subject: a for a in approach}
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
        for k in self._seen_order:
            key = self.keys[k]
            known = near.get(k)
            margin = known if known is not None else grid.pair(k, speed_hz)
            if margin.required_pct <= 0:
                out += engine.update_ranked(key, ts, 0, 0, {"reason": "no margin required"}, reading_id)
                continue
            forecast = soon.get(key.subject) if soon else None
            raise_rank, hold_rank = pair_ranks(margin, self.zetas[k], None if forecast is None else forecast.seconds,
                                               warning_s, self.hysteresis)
            evidence = functools.partial(_evidence, speed_hz, reading_id, grid, state, k, forecast)
            out += engine.update_ranked(key, ts, raise_rank, hold_rank, evidence, reading_id)
        return SpeedOutcome(inside, approach, out)

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
              k: int, forecast: ApproachForecast | None) -> dict[str, Any]:
    """A transition's evidence: the pair's margin row (the grid's arrays computed once per
    speed, kept in ``state``) and its forecast."""
    if not state:
        state.append(grid.compute(speed_hz))
    out = {"speed_hz": speed_hz, "reading_id": reading_id, **grid.row(state[0], k).to_json()}
    if forecast is not None:
        out["approach"] = forecast.to_json()
    return out
