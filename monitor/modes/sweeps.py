"""Splitting a speed history into sweeps: run-ups and coast-downs, apart from steady
running and stops.

:class:`SweepSplitter` is fed one reading at a time in time order (``ts`` epoch s, speed
Hz, optionally the 1x amplitude and phase the reading carries along) and returns each
:class:`Sweep` once it is complete. It keeps a bounded amount of state, all of it plain
JSON (:meth:`SweepSplitter.snapshot`, :meth:`SweepSplitter.from_snapshot`), so a service
can store it and carry on after a restart. The same splitter serves the live service and
the ``passage`` command, which feeds a whole file and then :meth:`SweepSplitter.flush`.

The rules (:class:`SweepRules`, docs/modes.md "Sweeps"); ``W = noise_hz / min_rate_hz_s``
is the longest time the speed may take to move by ``noise_hz`` inside a sweep:

1. **Stop.** A reading below ``stop_hz`` is not running: it ends any sweep and belongs to
   none.
2. **Gap.** Readings more than ``max_gap_s`` apart end a sweep; the later one starts afresh.
3. **Spike.** A reading whose speed lies beyond both neighbours, on the same side, by more
   than ``noise_hz`` and 10 % of their speed is dropped (an estimate locked on a
   harmonic, a lost tach pulse): one wrong speed must not end a sweep. This costs one
   reading of delay.
4. **Start.** A leg starts when the speed has risen (fallen) by at least ``noise_hz`` from
   the lowest (highest) reading of the last ``W`` seconds, at ``min_rate_hz_s`` or faster;
   it starts at that reading.
5. **Progress.** A leg goes on while the speed keeps moving its way: each move of at least
   ``noise_hz`` past the last progress point, at ``min_rate_hz_s`` or faster, is progress.
6. **End.** A leg ends at its extreme reading (highest of a run-up, lowest of a coast-down)
   when the speed turns back by more than ``noise_hz`` (the next leg starts there), when
   it makes no progress for ``W`` seconds (steady running, or a sweep that stalls in a
   band: it then dwells, which a sweep is not), or at a stop or a gap.
7. **Sweep.** The flat stretches at the two ends of a leg (readings within ``noise_hz / 2``
   of its first or its extreme speed) are cut to their last and first reading: steady
   running before and after is no part of a sweep. The leg is then a sweep when it has
   at least :data:`MIN_READINGS` readings and spans at least ``min_span_fraction`` of its
   top speed at an average of ``min_rate_hz_s`` or faster; a shorter or slower leg was
   steady running.

Readings come in time order; one not newer than the newest is ignored, but for a
speed-only reading and one with a 1x amplitude at the same instant (a speed message and
the waveform of that instant, in either order): they make one reading, the one with the
1x when the two speeds agree within the margin of rule 3 (``noise_hz`` or 10 % of the
speed), the speed-only one otherwise (the 1x was taken at another speed: an estimate
locked on a harmonic).

Memory: a leg keeps at most ``max_points`` readings (past that every other one is
dropped, halving its resolution), the look-back for rule 4 at most ``W`` seconds of
readings (and never more than ``max_points``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Literal, NamedTuple

from monitor.model import validate

#: Fewest readings in a sweep (the fewest a Bode curve with a peak and its flanks needs).
MIN_READINGS = 5
#: Rule 3: a spike departs from both neighbours by more than this share of their speed.
SPIKE_FRACTION = 0.1
#: Version of :meth:`SweepSplitter.snapshot`'s layout.
SNAPSHOT_VERSION = 1

SweepKind = Literal["run-up", "coast-down"]


class SpeedPoint(NamedTuple):
    """One reading: ``ts`` epoch s, ``speed_hz`` Hz, and what it carries along: the 1x
    ``amplitude`` (any unit, peak) and ``phase_deg`` (degrees), each None when absent."""

    ts: float
    speed_hz: float
    amplitude: float | None = None
    phase_deg: float | None = None


@dataclass(frozen=True)
class SweepRules:
    """What makes a sweep (module docstring, rules 1-7).

    Attributes
    ----------
    min_rate_hz_s : float
        Slowest sweep, Hz/s (0.02 Hz/s = 1.2 r/min per second): slower changes are steady
        running that drifts.
    min_span_fraction : float
        Smallest sweep, as a fraction of its top speed (0.1: 2.5 Hz at 25 Hz).
    noise_hz : float
        Speed changes up to this size, Hz, are noise (the hysteresis of rules 3-6).
    max_gap_s : float
        Longest time between two readings of one sweep, s.
    stop_hz : float
        Below this speed, Hz, the machine counts as stopped.
    max_points : int
        Most readings a sweep keeps.
    """

    min_rate_hz_s: float = 0.02
    min_span_fraction: float = 0.1
    noise_hz: float = 0.2
    max_gap_s: float = 120.0
    stop_hz: float = 1.0
    max_points: int = 2000

    def __post_init__(self) -> None:
        validate.positive(self.min_rate_hz_s, "min_rate_hz_s")
        validate.in_range(self.min_span_fraction, "min_span_fraction", 0.0, 1.0)
        validate.positive(self.noise_hz, "noise_hz")
        validate.positive(self.max_gap_s, "max_gap_s")
        validate.non_negative(self.stop_hz, "stop_hz")
        validate.whole_number(self.max_points, "max_points", minimum=2 * MIN_READINGS)

    @property
    def window_s(self) -> float:
        """``W``: the longest a sweep may take to move by ``noise_hz``, s."""
        return self.noise_hz / self.min_rate_hz_s


@dataclass(frozen=True)
class Sweep:
    """One run-up or coast-down: its readings in time order, from the start reading to the
    extreme one."""

    kind: SweepKind
    points: tuple[SpeedPoint, ...]

    @property
    def started_at(self) -> float:
        return self.points[0].ts

    @property
    def ended_at(self) -> float:
        return self.points[-1].ts

    @property
    def start_speed_hz(self) -> float:
        return self.points[0].speed_hz

    @property
    def end_speed_hz(self) -> float:
        return self.points[-1].speed_hz

    @property
    def rate_hz_s(self) -> float:
        """Average sweep rate, Hz/s (negative for a coast-down)."""
        return (self.end_speed_hz - self.start_speed_hz) / (self.ended_at - self.started_at)


def _point(raw: Any) -> SpeedPoint:
    ts, speed, amp, phase = raw
    return SpeedPoint(float(ts), float(speed), None if amp is None else float(amp),
                      None if phase is None else float(phase))


class SweepSplitter:
    """Incremental splitter of one speed history into sweeps (module docstring).

    ``update`` returns the sweeps completed by a reading (usually none); ``flush`` closes
    what is open at the end of the data; ``snapshot`` is the whole state as JSON.
    """

    def __init__(self, rules: SweepRules | None = None) -> None:
        self.rules = rules if rules is not None else SweepRules()
        self._last_ts: float | None = None  # newest reading accepted (time order)
        self._prev: SpeedPoint | None = None  # last reading past the spike test
        self._pending: SpeedPoint | None = None  # waits for its next neighbour (rule 3)
        self._recent: list[SpeedPoint] = []  # look-back while no leg is open (rule 4)
        self._leg: list[SpeedPoint] = []  # the open leg's readings
        self._direction = 0  # +1 run-up, -1 coast-down, 0 no leg
        self._extreme = math.nan  # the open leg's highest (run-up) or lowest speed
        self._progress: SpeedPoint | None = None  # the open leg's last progress point

    # ------------------------------------------------------------------ public

    @property
    def sweeping(self) -> SweepKind | None:
        """The direction of the leg open now ('run-up', 'coast-down'), or None. A leg is
        not yet known to be a sweep (rule 7 is judged at its end)."""
        return None if self._direction == 0 else _kind(self._direction)

    def update(self, point: SpeedPoint) -> tuple[Sweep, ...]:
        """Feed one reading; returns the sweeps it completes.

        A reading not newer than the last one is ignored (the caller feeds time order),
        but for a speed-only reading and one with a 1x at the same instant, which make
        one (module docstring). Raises ValueError for a non-finite time, a negative or
        non-finite speed, or a non-finite amplitude or phase.
        """
        p = _checked(point)
        if self._last_ts is not None and p.ts <= self._last_ts:
            held = self._pending  # the newest reading, still waiting for its next neighbour
            if held is not None and held.ts == p.ts and (held.amplitude is None) != (p.amplitude is None):
                bare, with_1x = (held, p) if held.amplitude is None else (p, held)
                margin = max(self.rules.noise_hz, SPIKE_FRACTION * bare.speed_hz)
                self._pending = with_1x if abs(with_1x.speed_hz - bare.speed_hz) <= margin else bare
            return ()
        self._last_ts = p.ts
        prev, pending = self._prev, self._pending
        self._pending = p
        if pending is None:
            return ()
        if prev is not None and self._is_spike(prev, pending, p):
            return ()
        self._prev = pending
        return self._step(pending)

    def flush(self) -> tuple[Sweep, ...]:
        """End of the data: take in the reading held for rule 3 and close the open leg.
        The splitter is then idle (feeding may go on)."""
        out: list[Sweep] = []
        if self._pending is not None:
            self._prev, pending = self._pending, self._pending
            self._pending = None
            out += self._step(pending)
        out += self._close()
        self._recent = []
        return tuple(out)

    def snapshot(self) -> dict[str, Any]:
        """The whole state as plain JSON (lists, numbers, null)."""
        return {
            "version": SNAPSHOT_VERSION,
            "last_ts": self._last_ts,
            "prev": None if self._prev is None else list(self._prev),
            "pending": None if self._pending is None else list(self._pending),
            "recent": [list(p) for p in self._recent],
            "leg": [list(p) for p in self._leg],
            "direction": self._direction,
            "extreme": None if self._direction == 0 else self._extreme,
            "progress": None if self._progress is None else list(self._progress),
        }

    @classmethod
    def from_snapshot(cls, snapshot: dict[str, Any], rules: SweepRules | None = None) -> SweepSplitter:
        """A splitter that carries on from ``snapshot`` (:meth:`snapshot`).

        Raises ValueError when the snapshot is of another layout or malformed.
        """
        if not isinstance(snapshot, dict) or snapshot.get("version") != SNAPSHOT_VERSION:
            raise ValueError(f"snapshot must be a sweep splitter state of version {SNAPSHOT_VERSION}.")
        s = cls(rules)
        try:
            s._last_ts = None if snapshot["last_ts"] is None else float(snapshot["last_ts"])
            s._prev = None if snapshot["prev"] is None else _point(snapshot["prev"])
            s._pending = None if snapshot["pending"] is None else _point(snapshot["pending"])
            s._recent = [_point(p) for p in snapshot["recent"]]
            s._leg = [_point(p) for p in snapshot["leg"]]
            s._direction = int(snapshot["direction"])
            s._extreme = math.nan if snapshot["extreme"] is None else float(snapshot["extreme"])
            s._progress = None if snapshot["progress"] is None else _point(snapshot["progress"])
        except (KeyError, TypeError, ValueError):
            raise ValueError("snapshot is not a well-formed sweep splitter state.") from None
        if s._direction not in (-1, 0, 1) or (s._direction != 0) != bool(s._leg):
            raise ValueError("snapshot is not a well-formed sweep splitter state.")
        return s

    # ------------------------------------------------------------------ rules

    def _is_spike(self, a: SpeedPoint, b: SpeedPoint, c: SpeedPoint) -> bool:
        """Rule 3, for ``b`` between its neighbours ``a`` and ``c`` (no gap between)."""
        gap = self.rules.max_gap_s
        if b.ts - a.ts > gap or c.ts - b.ts > gap:
            return False
        margin = max(self.rules.noise_hz, SPIKE_FRACTION * 0.5 * (a.speed_hz + c.speed_hz))
        up = b.speed_hz - a.speed_hz > margin and b.speed_hz - c.speed_hz > margin
        down = a.speed_hz - b.speed_hz > margin and c.speed_hz - b.speed_hz > margin
        return up or down

    def _step(self, p: SpeedPoint) -> tuple[Sweep, ...]:
        """Rules 1, 2 and 4-6 for one reading past the spike test."""
        r = self.rules
        out: list[Sweep] = []
        last = self._leg[-1] if self._leg else (self._recent[-1] if self._recent else None)
        if p.speed_hz < r.stop_hz or (last is not None and p.ts - last.ts > r.max_gap_s):
            out += self._close()
            self._recent = []
            if p.speed_hz < r.stop_hz:
                return tuple(out)
        if self._direction:
            d = self._direction
            if d * (self._extreme - p.speed_hz) > r.noise_hz:  # turned back: rule 6
                out += self._close()
            else:
                self._append(p)
                progress = self._progress
                assert progress is not None
                advance, elapsed = d * (p.speed_hz - progress.speed_hz), p.ts - progress.ts
                if advance >= max(r.noise_hz, r.min_rate_hz_s * elapsed):  # rule 5
                    self._progress = p
                elif elapsed > r.window_s:  # no progress: rule 6
                    out += self._close()
                return tuple(out)
        self._look_for_start(p)
        return tuple(out)

    def _look_for_start(self, p: SpeedPoint) -> None:
        """Rule 4: open a leg from the lowest or highest recent reading, or remember ``p``."""
        r = self.rules
        recent = [q for q in self._recent if p.ts - q.ts <= r.window_s] or self._recent[-1:]
        recent = recent[-(r.max_points - 1):] + [p]
        best = None
        for d in (1, -1):
            i = max(range(len(recent)), key=lambda j: (-d * recent[j].speed_hz, j))
            start = recent[i]
            advance, elapsed = d * (p.speed_hz - start.speed_hz), p.ts - start.ts
            if advance >= max(r.noise_hz, r.min_rate_hz_s * elapsed) and (
                best is None or advance > best[0]
            ):
                best = (advance, d, i)
        if best is None:
            self._recent = recent
            return
        _, d, i = best
        self._leg, self._recent, self._direction = recent[i:], [], d
        self._extreme = max(d * q.speed_hz for q in self._leg) * d
        self._progress = p

    def _append(self, p: SpeedPoint) -> None:
        self._leg.append(p)
        if self._direction * (p.speed_hz - self._extreme) > 0:
            self._extreme = p.speed_hz
        if len(self._leg) > self.rules.max_points:
            # keep every other reading, and the newest: resolution halves, memory stays bounded
            self._leg = self._leg[:-1:2] + [self._leg[-1]]

    def _close(self) -> list[Sweep]:
        """End the open leg at its extreme reading (rule 6); the readings from there on
        become the look-back. Returns the leg when it is a sweep (rule 7)."""
        if not self._direction:
            return []
        d, leg = self._direction, self._leg
        k = max(range(len(leg)), key=lambda j: (d * leg[j].speed_hz, -j))
        self._recent = leg[k:]
        self._leg, self._direction, self._extreme, self._progress = [], 0, math.nan, None
        kept = _trimmed(leg[: k + 1], d, 0.5 * self.rules.noise_hz)
        return [Sweep(_kind(d), tuple(kept))] if self._is_sweep(kept) else []

    def _is_sweep(self, points: list[SpeedPoint]) -> bool:
        """Rule 7."""
        if len(points) < MIN_READINGS:
            return False
        first, last = points[0], points[-1]
        span = abs(last.speed_hz - first.speed_hz)
        top = max(first.speed_hz, last.speed_hz)
        elapsed = last.ts - first.ts
        return (
            span >= self.rules.min_span_fraction * top
            and elapsed > 0
            and span / elapsed >= self.rules.min_rate_hz_s
        )


def _trimmed(points: list[SpeedPoint], d: int, flat_hz: float) -> list[SpeedPoint]:
    """``points`` without the flat stretches at either end: from the last reading within
    ``flat_hz`` of the first speed to the first reading within ``flat_hz`` of the last
    (the extreme), so steady running before and after is not part of the sweep."""
    i, k = 0, len(points) - 1
    while i < k and d * (points[i + 1].speed_hz - points[0].speed_hz) <= flat_hz:
        i += 1
    while k > i and d * (points[-1].speed_hz - points[k - 1].speed_hz) <= flat_hz:
        k -= 1
    return points[i : k + 1]


def _kind(direction: int) -> SweepKind:
    return "run-up" if direction > 0 else "coast-down"


def _checked(point: SpeedPoint) -> SpeedPoint:
    ts = validate.finite(point.ts, "ts")
    speed = validate.non_negative(point.speed_hz, "speed_hz")
    amp = None if point.amplitude is None else validate.non_negative(point.amplitude, "amplitude")
    phase = None if point.phase_deg is None else validate.finite(point.phase_deg, "phase_deg")
    return SpeedPoint(ts, speed, amp, phase)
