"""What detection makes of one reading: :class:`ReadingEvaluation` with its growth
features (:class:`FeatureEvaluation`), for the store, the dashboard and alarm evidence.

The features of a reading are decided on plain numbers and their evaluation objects are
built only when something reads them (:class:`FeatureRows`), as the margin table is
(:class:`~monitor.detection.margins.MarginRows`): most readings' features and margins are
never looked at.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

from monitor.detection.alarms import SEVERITIES, Transition
from monitor.detection.health import HealthReport
from monitor.detection.margins import ApproachForecast, MarginRow, MarginRows
from monitor.detection.zones import ZoneLimits


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
    raise_level: str | None
    hold_level: str | None
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
    the reading's speed (a sequence of :class:`MarginRow`, built on first use); ``approach`` forecasts from the speed trend; ``features`` the
    growth features; ``growth_ignored`` why growth skipped the reading (None when used);
    ``machine_alarms_suppressed`` when sensor health flagged the reading; ``transitions``
    the alarm transitions the reading caused.
    """

    machine: str
    point: str
    ts: float
    reading_id: str | None
    speed_hz: float | None
    overall_velocity_mm_s_rms: float | None
    zone: str | None
    zone_limits: ZoneLimits
    margins: Sequence[MarginRow]
    approach: tuple[ApproachForecast, ...]
    features: Sequence[FeatureEvaluation]
    health: HealthReport
    growth_ignored: str | None
    machine_alarms_suppressed: bool
    transitions: tuple[Transition, ...] = field(default_factory=tuple)

    def feature(self, name: str) -> FeatureEvaluation | None:
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
        }
        if margins:
            out["margins"] = [m.to_json() for m in self.margins]
        return out


_LEVELS: tuple[str | None, ...] = (None, *SEVERITIES)
_READY = ("ready",)


def _feature_of(spec: tuple) -> FeatureEvaluation:
    """The :class:`FeatureEvaluation` of one row of :meth:`MachineEvaluator._growth`."""
    (name, value, unit, st, status, ratio, per_day, lim_name, lim_val, ttl,
     raise_l, hold_l, parts) = spec
    if status[0] == "learning":
        words = f"learning {status[1]}/{status[2]}"
    elif status[0] == "speed":
        words = f"not comparable: speed {status[1]:.2f} Hz, baseline at {status[2]:.2f} Hz"
    else:
        words = "ready"
    causes = []
    for p in parts:
        if p[0] == "zone":
            causes.append(f"zone {p[1]} ({p[2]:.3g} mm/s RMS)")
        elif p[0] == "ratio":
            causes.append(f"{p[1]:.2f}x baseline")
        else:
            causes.append(f"{p[1]} in {p[2] / 86400.0:.1f} days at the current trend")
    return FeatureEvaluation(
        name=name, value=value, unit=unit,
        baseline_median=st.median if st else None, baseline_mad=st.mad if st else None,
        baseline_status=words, ratio=ratio, trend_per_day=per_day,
        limit_name=lim_name, limit_value=lim_val, time_to_limit_s=ttl,
        raise_level=raise_l, hold_level=hold_l, causes=tuple(causes),
    )


class FeatureRows(Sequence[FeatureEvaluation]):
    """The growth features of one reading, each :class:`FeatureEvaluation` built on first
    use. Behaves as a read-only sequence (``len``, indexing, iteration, equality with a
    tuple); :meth:`get` finds one feature by name without building the others."""

    __slots__ = ("_specs", "_made")

    def __init__(self, specs: Sequence[tuple] = ()) -> None:
        self._specs = list(specs)
        self._made: list[FeatureEvaluation | None] = [None] * len(self._specs)

    def _one(self, i: int) -> FeatureEvaluation:
        fe = self._made[i]
        if fe is None:
            fe = self._made[i] = _feature_of(self._specs[i])
        return fe

    def names(self) -> tuple[str, ...]:
        return tuple(sp[0] for sp in self._specs)

    def get(self, name: str) -> FeatureEvaluation | None:
        for i, sp in enumerate(self._specs):
            if sp[0] == name:
                return self._one(i)
        return None

    def __len__(self) -> int:
        return len(self._specs)

    def __getitem__(self, index):  # type: ignore[override]
        if isinstance(index, slice):
            return tuple(self)[index]
        n = len(self._specs)
        if not -n <= index < n:
            raise IndexError("feature index out of range")
        return self._one(index % n)

    def __iter__(self):
        return (self._one(i) for i in range(len(self._specs)))

    def __eq__(self, other: object) -> bool:
        if isinstance(other, FeatureRows | tuple | list):
            return tuple(self) == tuple(other)
        return NotImplemented

    __hash__ = None  # type: ignore[assignment]

    def __repr__(self) -> str:
        return f"FeatureRows({', '.join(self.names())})"


