"""Running or stopped: whether a machine turns within its operating range.

A reading taken while the machine is stopped, coasting down below its operating range or
still running up to it describes no operating condition: its levels are comparable with
nothing the baselines learned (docs/alarms.md, "Running and stopped"). The evaluator
(:mod:`monitor.detection.evaluator`) asks :class:`RunningWatch` for each reading's
:class:`RunJudgement`; a stopped reading is stored, flagged, and feeds no growth rule.

A reading is *stopped* when

- the running speed is below ``min_running_speed_hz`` (detection setting; by default the
  bottom of the registry's ``speed_range_rpm``). The speed judged is a measured one: the
  reading's own (tach pulses or the payload's ``speed_hz``), else the newest message of
  the speed stream within :data:`SPEED_FRESH_S` of the reading. A speed estimated from the
  spectrum is searched inside the operating range only (so it cannot fall below it: on a
  coast-down it locks onto 2x), and is judged only against a minimum set above the range;
- or, when no measured speed is at hand (the speed is estimated), its overall velocity is
  below ``stopped_overall_mm_s`` (0.3 mm/s RMS by default: common practice, a level below
  the residual vibration of a running machine on its mounts and above the noise floor of
  an industrial accelerometer channel). A measured speed inside the operating range says
  running whatever the level: a smooth machine running below the threshold keeps its
  growth watch (a defect growing from 0.2 mm/s would otherwise go unseen);
- or an engineer announced a stop that covers the reading's time.

The machine is stopped while its latest judgement says so (a reading, or a speed message
alone) or an announced stop covers the time asked about: :meth:`RunningWatch.quiet_at`,
which also silences the stale-stream check (sensors are often switched off with the
machine. ANSI/ISA-18.2-2016 / IEC 62682 (from memory: the nuisance-alarm definition and
designed, state-based suppression): an alarm that calls for no operator action in the
present operating state is a nuisance alarm and is suppressed by design).

All speeds Hz, levels mm/s RMS, times epoch seconds UTC.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Literal

#: A speed-stream message counts for the readings within this many seconds of it (our
#: choice: a speed stream publishes every few seconds; an older value may be past).
SPEED_FRESH_S = 60.0
#: Default stopped threshold of the overall velocity, mm/s RMS (common practice).
STOPPED_OVERALL_MM_S = 0.3

RunState = Literal["running", "stopped"]
RUNNING: RunState = "running"
STOPPED: RunState = "stopped"


@dataclass(frozen=True)
class RunJudgement:
    """Whether a reading (or speed message) was taken with the machine running.

    ``state`` 'running' or 'stopped'; ``reason`` why stopped (None when running);
    ``speed_hz`` the speed judged (None when no measured speed was at hand) and its
    ``speed_source`` ('measured', 'speed stream' or 'estimated')."""

    state: RunState
    reason: str | None = None
    speed_hz: float | None = None
    speed_source: str | None = None

    @property
    def stopped(self) -> bool:
        return self.state == STOPPED

    def to_json(self) -> dict[str, Any]:
        return {"state": self.state, "reason": self.reason, "speed_hz": self.speed_hz,
                "speed_source": self.speed_source}


def judge_running(speed_hz: float | None, overall_mm_s: float | None, min_speed_hz: float,
                  stopped_overall_mm_s: float, speed_source: str | None = None) -> RunJudgement:
    """Judge one reading from its running speed (Hz, None if unknown) and overall velocity
    (mm/s RMS, None if unknown): stopped below ``min_speed_hz``; else, unless the speed
    was measured (``speed_source`` 'measured' or 'speed stream': a measured speed in the
    operating range is the better evidence, and a smooth machine running at a low level
    must keep its growth watch), below ``stopped_overall_mm_s`` (0 disables the level
    test). Pure."""
    if speed_hz is not None and math.isfinite(speed_hz) and speed_hz < min_speed_hz:
        return RunJudgement(STOPPED, f"speed {speed_hz:.2f} Hz below the minimum running speed "
                                     f"{min_speed_hz:.2f} Hz", speed_hz, speed_source)
    measured = speed_source in ("measured", "speed stream") and speed_hz is not None
    if (not measured and overall_mm_s is not None and math.isfinite(overall_mm_s)
            and overall_mm_s < stopped_overall_mm_s):
        return RunJudgement(STOPPED, f"overall {overall_mm_s:.2f} mm/s RMS below the stopped threshold "
                                     f"{stopped_overall_mm_s:.2f} mm/s RMS", speed_hz, speed_source)
    return RunJudgement(RUNNING, None, speed_hz, speed_source)


def announced_at(stops: Iterable[tuple[float, float]], ts: float) -> tuple[float, float] | None:
    """The announced stop ``(start, until)`` (epoch s, until excluded) covering ``ts``, or
    None. Pure."""
    for start, until in stops:
        if start <= ts < until:
            return (start, until)
    return None


class RunningWatch:
    """Running or stopped for one machine (module docstring).

    Parameters
    ----------
    min_speed_hz : float
        Minimum running speed, Hz.
    stopped_overall_mm_s : float
        Overall velocity below which a reading is stopped, mm/s RMS (0: no level test).
    """

    def __init__(self, min_speed_hz: float, stopped_overall_mm_s: float) -> None:
        self.min_speed_hz = float(min_speed_hz)
        self.stopped_overall_mm_s = float(stopped_overall_mm_s)
        #: Newest speed-stream message ``(ts, Hz)``.
        self.stream: tuple[float, float] | None = None
        #: Latest judgement ``(ts, state, reason)``.
        self.last: tuple[float, RunState, str | None] | None = None
        #: Stops an engineer announced, ``(start, until)`` epoch s (set by the service).
        self.announced: tuple[tuple[float, float], ...] = ()

    def saw_speed(self, ts: float, speed_hz: float) -> RunJudgement:
        """A speed-stream message: kept for the readings near it; judges the machine by
        the speed alone."""
        if self.stream is None or ts >= self.stream[0]:
            self.stream = (float(ts), float(speed_hz))
        j = judge_running(speed_hz, None, self.min_speed_hz, 0.0, "speed stream")
        j = self._announced(ts, j)
        self._remember(ts, j)
        return j

    def judge(self, ts: float, speed_hz: float | None, speed_source: str | None,
              overall_mm_s: float | None) -> RunJudgement:
        """Judge a reading at ``ts`` from its analysis' speed (``speed_source``
        'measured' or 'estimated') and overall level; the speed stream stands in for an
        estimated speed when it has a message within :data:`SPEED_FRESH_S`."""
        speed, source = speed_hz, speed_source
        if source != "measured" and self.stream is not None and abs(ts - self.stream[0]) <= SPEED_FRESH_S:
            speed, source = self.stream[1], "speed stream"
        j = judge_running(speed, overall_mm_s, self.min_speed_hz, self.stopped_overall_mm_s, source)
        j = self._announced(ts, j)
        self._remember(ts, j)
        return j

    def quiet_at(self, now: float) -> bool:
        """No stale-stream alarm at ``now``: a stop is announced then, or the machine's
        latest judgement is stopped."""
        if announced_at(self.announced, now) is not None:
            return True
        return self.last is not None and self.last[1] == STOPPED

    @property
    def state(self) -> RunState | None:
        """The latest judgement's state, None before any."""
        return None if self.last is None else self.last[1]

    def status_json(self, now: float | None = None) -> dict[str, Any]:
        """``running`` of the retained status: ``{"state", "at", "reason",
        "announced_until"}`` (``at``: the latest judgement's time; times epoch s, or None)."""
        until = None
        if now is not None:
            stop = announced_at(self.announced, now)
            until = None if stop is None else stop[1]
        state = None if self.last is None else self.last[1]
        if until is not None:
            state = STOPPED
        return {"state": state, "reason": None if self.last is None else self.last[2],
                "at": None if self.last is None else self.last[0], "announced_until": until}

    def snapshot(self) -> dict[str, Any]:
        return {"stream": None if self.stream is None else list(self.stream),
                "last": None if self.last is None else list(self.last)}

    def restore(self, data: Mapping[str, Any] | None) -> None:
        if not data:
            return
        s = data.get("stream")
        self.stream = None if s is None else (float(s[0]), float(s[1]))
        last = data.get("last")
        if last is not None:
            state: RunState = STOPPED if last[1] == STOPPED else RUNNING
            self.last = (float(last[0]), state, last[2])

    def _announced(self, ts: float, j: RunJudgement) -> RunJudgement:
        stop = announced_at(self.announced, ts)
        if stop is None or j.stopped:
            return j
        return RunJudgement(STOPPED, "stop announced", j.speed_hz, j.speed_source)

    def _remember(self, ts: float, j: RunJudgement) -> None:
        """The latest judgement (the state depends on the newest data only, so a detector
        restored from a state written before this one existed agrees from its next
        reading on)."""
        if self.last is not None and ts < self.last[0]:
            return  # an older message does not change the present state
        self.last = (float(ts), j.state, j.reason)


def set_announced(watch: RunningWatch, stops: Sequence[tuple[float, float]]) -> None:
    """Give ``watch`` the stops announced for its machine (``(start, until)`` epoch s)."""
    watch.announced = tuple(sorted((float(a), float(b)) for a, b in stops))
