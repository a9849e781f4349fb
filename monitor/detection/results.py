"""What detection makes of one reading: :class:`ReadingEvaluation` with its growth
features (:class:`FeatureEvaluation`), for the store, the dashboard and alarm evidence.

The features of a reading are decided on plain numbers and their evaluation objects are
built only when something reads them (:class:`FeatureRows`), as the margin table is
(:class:`~monitor.detection.margins.MarginRows`): most readings' features and margins are
never looked at.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from typing import overload

from monitor.detection.alarms import LEVELS, Severity, Transition
from monitor.detection.approach import ApproachForecast
from monitor.detection.growth_rules import FeatureVerdict
from monitor.detection.health import HealthReport
from monitor.detection.margins import MarginRow, MarginRows
from monitor.detection.running import RunJudgement
from monitor.detection.zones import Zone, ZoneLimits


@dataclass(frozen=True)
class FeatureEvaluation:
    """One growth feature of one reading.

    ``value`` in ``unit``; baseline median/MAD in the same unit; ``ratio`` value over the
    baseline median (None while learning or not comparable); ``baseline_status`` in words;
    ``trend_per_day`` Theil-Sen slope (unit/day); ``limit_name``/``limit_value`` the next
    limit the trend is projected to (a zone boundary for ``overall``, a baseline ratio
    limit otherwise); ``time_to_limit_s`` seconds (None when not rising); ``raise_level``
    and ``hold_level`` as given to the alarm engine.
    """

    name: str
    value: float
    unit: str
    baseline_median: float | None
    baseline_mad: float | None
    baseline_status: str
    ratio: float | None
    trend_per_day: float | None
    limit_name: str | None
    limit_value: float | None
    time_to_limit_s: float | None
    raise_level: Severity | None
    hold_level: Severity | None
    causes: tuple[str, ...] = ()

    def to_json(self) -> dict:
        return {
            "name": self.name, "value": self.value, "unit": self.unit,
            "baseline_median": self.baseline_median, "baseline_mad": self.baseline_mad,
            "baseline_status": self.baseline_status, "ratio": self.ratio,
            "trend_per_day": self.trend_per_day, "limit_name": self.limit_name,
            "limit_value": self.limit_value, "time_to_limit_s": self.time_to_limit_s,
            "time_to_limit_days": None if self.time_to_limit_s is None else self.time_to_limit_s / 86400.0,
            "raise_level": self.raise_level, "hold_level": self.hold_level,
            "causes": list(self.causes),
        }


@dataclass(frozen=True)
class ReadingEvaluation:
    """What detection made of one reading (for the store and the dashboard).

    ``zone`` of ``overall_velocity_mm_s_rms`` against ``zone_limits``; ``margins`` table at
    the reading's speed (a sequence of :class:`MarginRow`, built on first use);
    ``approach`` forecasts from the speed trend; ``features`` the growth features;
    ``growth_ignored`` why growth skipped the reading (None when used);
    ``machine_alarms_suppressed`` when sensor health flagged the reading (or it was out of
    service); ``transitions`` the alarm transitions the reading caused; ``out_of_service``
    when its point was out of service (planned work: nothing raised, nothing learnt);
    ``running`` whether the machine was running or stopped (monitor/detection/running.py;
    None when the analysis failed).
    """

    machine: str
    point: str
    ts: float
    reading_id: str | None
    speed_hz: float | None
    overall_velocity_mm_s_rms: float | None
    zone: Zone | None
    zone_limits: ZoneLimits
    margins: Sequence[MarginRow]
    approach: tuple[ApproachForecast, ...]
    features: Sequence[FeatureEvaluation]
    health: HealthReport
    growth_ignored: str | None
    machine_alarms_suppressed: bool
    transitions: tuple[Transition, ...] = field(default_factory=tuple)
    out_of_service: bool = False
    running: RunJudgement | None = None

    @property
    def stopped(self) -> bool:
        """The reading was taken with the machine stopped (stored flagged, no growth)."""
        return self.running is not None and self.running.stopped

    def feature(self, name: str) -> FeatureEvaluation | None:
        """The growth feature ``name`` of this reading, or None."""
        if isinstance(self.features, FeatureRows):
            return self.features.get(name)
        for f in self.features:
            if f.name == name:
                return f
        return None

    def nearest_margin(self) -> MarginRow | None:
        """The tightest (mode, excitation) pair at this reading's speed: the margin row
        with the smallest ``margin_pct - required_pct`` (percent; the first on a tie), or
        None without a margin table. Cheaper than scanning :attr:`margins` (one row is
        built)."""
        if isinstance(self.margins, MarginRows):
            return self.margins.nearest_margin()
        return min(self.margins, key=lambda r: r.margin_pct - r.required_pct, default=None)

    def to_json(self, *, margins: bool = True) -> dict:
        """JSON-able form; ``margins=False`` leaves out the margin table (the costly part),
        for readings whose table nobody will read (a store keeping it on the newest only)."""
        out = {
            "machine": self.machine, "point": self.point, "ts": self.ts,
            "reading_id": self.reading_id, "speed_hz": self.speed_hz,
            "overall_velocity_mm_s_rms": self.overall_velocity_mm_s_rms, "zone": self.zone,
            "zone_limits_mm_s": list(self.zone_limits.as_tuple()),
            "zone_limits_source": self.zone_limits.source,
            "approach": [a.to_json() for a in self.approach],
            "features": [f.to_json() for f in self.features],
            "health": self.health.to_json(), "growth_ignored": self.growth_ignored,
            "machine_alarms_suppressed": self.machine_alarms_suppressed,
            "transitions": [t.to_json() for t in self.transitions],
            "running": None if self.running is None else self.running.to_json(),
            "stopped": self.stopped,
        }
        if self.out_of_service:
            out["out_of_service"] = True
        if margins:
            out["margins"] = [m.to_json() for m in self.margins]
        return out


@dataclass(frozen=True)
class SpeedEvaluation:
    """What detection made of one running-speed message (for the store and the
    dashboard): resonance depends on the speed alone, so a speed stream keeps it current
    while the vibration sensors are faulted or absent.

    ``speed_hz`` the running speed (0: standing still, then nothing else is evaluated);
    ``margins`` the margin table at that speed (built on first use); ``approach`` the
    forecasts from the speed trend; ``sweeping`` the subjects ('<mode>@<excitation>')
    whose required band the speed is sweeping through; ``transitions`` the resonance
    alarm transitions the message caused.
    """

    machine: str
    ts: float
    speed_hz: float
    margins: Sequence[MarginRow]
    approach: tuple[ApproachForecast, ...]
    sweeping: tuple[str, ...]
    transitions: tuple[Transition, ...] = ()

    def nearest_margin(self) -> MarginRow | None:
        """The tightest (mode, excitation) pair at this speed, as
        :meth:`ReadingEvaluation.nearest_margin`."""
        if isinstance(self.margins, MarginRows):
            return self.margins.nearest_margin()
        return min(self.margins, key=lambda r: r.margin_pct - r.required_pct, default=None)

    def to_json(self, *, margins: bool = True) -> dict:
        """JSON-able form; ``margins=False`` leaves out the margin table."""
        out = {
            "machine": self.machine, "ts": self.ts, "speed_hz": self.speed_hz,
            "approach": [a.to_json() for a in self.approach], "sweeping": list(self.sweeping),
            "transitions": [t.to_json() for t in self.transitions],
        }
        if margins:
            out["margins"] = [m.to_json() for m in self.margins]
        return out


def feature_evaluation(verdict: FeatureVerdict) -> FeatureEvaluation:
    """The :class:`FeatureEvaluation` of a growth verdict, its status and causes in words."""
    feature, stats, trend, limit = verdict.feature, verdict.baseline, verdict.trend, verdict.limit
    return FeatureEvaluation(
        name=feature.name, value=verdict.value, unit=feature.unit,
        baseline_median=None if stats is None else stats.median,
        baseline_mad=None if stats is None else stats.mad,
        baseline_status=verdict.status.words(), ratio=verdict.ratio,
        trend_per_day=None if trend is None else trend.slope_per_day,
        limit_name=None if limit is None else limit[0], limit_value=None if limit is None else limit[1],
        time_to_limit_s=verdict.time_to_limit_s,
        raise_level=LEVELS[verdict.raise_rank], hold_level=LEVELS[verdict.hold_rank],
        causes=tuple(cause.words() for cause in verdict.causes),
    )


class FeatureRows(Sequence[FeatureEvaluation]):
    """The growth features of one reading, each :class:`FeatureEvaluation` built on first
    use from its verdict. Behaves as a read-only sequence (``len``, indexing, iteration,
    equality with a tuple); :meth:`get` finds one feature by name without building the
    others."""

    __slots__ = ("_verdicts", "_made")

    def __init__(self, verdicts: Sequence[FeatureVerdict] = ()) -> None:
        self._verdicts = list(verdicts)
        self._made: list[FeatureEvaluation | None] = [None] * len(self._verdicts)

    def _one(self, i: int) -> FeatureEvaluation:
        fe = self._made[i]
        if fe is None:
            fe = self._made[i] = feature_evaluation(self._verdicts[i])
        return fe

    def names(self) -> tuple[str, ...]:
        return tuple(v.feature.name for v in self._verdicts)

    def get(self, name: str) -> FeatureEvaluation | None:
        for i, v in enumerate(self._verdicts):
            if v.feature.name == name:
                return self._one(i)
        return None

    def __len__(self) -> int:
        return len(self._verdicts)

    @overload
    def __getitem__(self, index: int) -> FeatureEvaluation: ...

    @overload
    def __getitem__(self, index: slice) -> tuple[FeatureEvaluation, ...]: ...

    def __getitem__(self, index: int | slice) -> FeatureEvaluation | tuple[FeatureEvaluation, ...]:
        if isinstance(index, slice):
            return tuple(self)[index]
        n = len(self._verdicts)
        if not -n <= index < n:
            raise IndexError("feature index out of range")
        return self._one(index % n)

    def __iter__(self) -> Iterator[FeatureEvaluation]:
        return (self._one(i) for i in range(len(self._verdicts)))

    def __eq__(self, other: object) -> bool:
        if isinstance(other, FeatureRows | tuple | list):
            return tuple(self) == tuple(other)
        return NotImplemented

    __hash__ = None  # type: ignore[assignment]

    def __repr__(self) -> str:
        return f"FeatureRows({', '.join(self.names())})"
