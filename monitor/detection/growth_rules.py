"""Alarm levels of one amplitude-growth feature of a reading (pure; docs/alarms.md).

Three rules give each a raise and a hold level; the worst of each wins:

- zone (the overall velocity only, ISO 20816-3 zones): raised alert in zone C and severe in
  zone D (a zone includes its upper boundary); held while the value stays above the B/C or
  C/D boundary lowered by the hysteresis;
- baseline ratio: advisory and alert at the two growth ratios over the baseline median,
  held down to the ratios lowered by the hysteresis; raised only when the value also lies
  more than ``baseline_sigmas`` robust standard deviations above the median (else it is the
  baseline's own scatter);
- trend: advisory when the Theil-Sen trend reaches the next limit that matters (B/C, C/D
  or a ratio limit) within the horizon, held within the horizon lengthened by the
  hysteresis. The next limit is the first one the fitted line has not reached yet, so
  one noisy reading beyond a limit neither gives a time of zero nor skips a limit.

The outcome is a :class:`FeatureVerdict` of plain numbers; its words are made only when
someone reads them (:mod:`monitor.detection.results`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple

from monitor.detection.alarms import level_ranks_above
from monitor.detection.features import OVERALL, Feature
from monitor.detection.growth import Baseline, BaselineStats, Trend, time_to_limit
from monitor.detection.zones import Zone, ZoneLimits, boundary_above, first_boundary_above, zone_of
from monitor.model.detection_settings import DetectionSettings


class Learning(NamedTuple):
    """The baseline is still learning: ``readings`` of ``size`` readings so far."""

    readings: int
    size: int

    def words(self) -> str:
        return f"learning {self.readings}/{self.size}"


class OutOfSpeedBand(NamedTuple):
    """The running speed (Hz) lies outside the band around the baseline's speed (Hz)."""

    speed_hz: float
    baseline_speed_hz: float

    def words(self) -> str:
        return f"not comparable: speed {self.speed_hz:.2f} Hz, baseline at {self.baseline_speed_hz:.2f} Hz"


class Sweeping(NamedTuple):
    """The reading was taken while the speed swept an excitation through a required band
    (``subjects``, '<mode>@<excitation>'): left out of the baseline and the trend, only its
    zone is judged."""

    subjects: tuple[str, ...]

    def words(self) -> str:
        return f"not comparable: sweep through band {', '.join(self.subjects)}"


class InBand(NamedTuple):
    """The speed-normalised 1x of a reading whose 1x lies inside the required band of
    ``subjects``: dividing by the speed squared does not remove a resonant amplification,
    so the value is compared with nothing."""

    subjects: tuple[str, ...]

    def words(self) -> str:
        return f"not comparable: 1x inside the required band of {', '.join(self.subjects)}"


class Ready(NamedTuple):
    """The baseline is learned and comparable."""

    def words(self) -> str:
        return "ready"


READY = Ready()
#: Raise rank by zone: alert in C, severe in D.
_ZONE_RAISE_RANK: dict[Zone, int] = {"C": 2, "D": 3}
BaselineStatus = Learning | OutOfSpeedBand | Sweeping | InBand | Ready


class ZoneCause(NamedTuple):
    """The overall velocity (mm/s RMS) lies in a zone that raises or holds a level."""

    zone: Zone
    value_mm_s: float

    def words(self) -> str:
        return f"zone {self.zone} ({self.value_mm_s:.3g} mm/s RMS)"


class RatioCause(NamedTuple):
    """The value over the baseline median raises or holds a level."""

    ratio: float

    def words(self) -> str:
        return f"{self.ratio:.2f}x baseline"


class TrendCause(NamedTuple):
    """The trend reaches ``limit_name`` in ``seconds``."""

    limit_name: str
    seconds: float

    def words(self) -> str:
        return f"{self.limit_name} in {self.seconds / 86400.0:.1f} days at the current trend"


Cause = ZoneCause | RatioCause | TrendCause


class FeatureVerdict(NamedTuple):
    """What the rules made of one feature of one reading.

    ``value`` in the feature's unit; ``baseline`` the learned median and MAD (None while learning); ``ratio`` the value
    over the baseline median (None while learning or not comparable); ``trend`` the
    Theil-Sen trend (None without one); ``limit`` the next limit, (name, value in the
    feature's unit): a zone boundary for ``overall``, a ratio limit otherwise, the first
    one above the trend's fitted level now (above the value without a trend);
    ``time_to_limit_s`` seconds until the trend reaches it (None when not rising);
    ``raise_rank`` and ``hold_rank`` as :func:`~monitor.detection.alarms.severity_rank`;
    ``causes`` the rules that hold.
    """

    feature: Feature
    value: float
    baseline: BaselineStats | None
    status: BaselineStatus
    ratio: float | None
    trend: Trend | None
    limit: tuple[str, float] | None
    time_to_limit_s: float | None
    raise_rank: int
    hold_rank: int
    causes: tuple[Cause, ...]


def baseline_status(baseline: Baseline, comparable: bool, speed_hz: float,
                    left_out: Sweeping | InBand | None = None) -> BaselineStatus:
    """Where ``baseline`` stands for a reading at ``speed_hz`` (Hz); ``comparable`` is
    whether the reading's speed lies within the baseline's speed band; ``left_out`` why
    the reading is compared with nothing (then that is the status)."""
    if left_out is not None:
        return left_out
    if baseline.stats is None:
        return Learning(len(baseline.values), baseline.size)
    if not comparable:
        assert baseline.speed_hz is not None  # only a learned speed makes a reading not comparable
        return OutOfSpeedBand(speed_hz, baseline.speed_hz)
    return READY


@dataclass(frozen=True)
class GrowthRules:
    """The rules' thresholds for one machine (:meth:`from_settings`).

    ``hysteresis`` a fraction; ``ratio_limits`` (rank, ratio over the baseline median)
    of the advisory and alert ratios, ``ratio_names`` (ratio, name); ``sigmas`` robust standard
    deviations above the median a raise by ratio needs; ``horizon_s`` the trend horizon,
    seconds.
    """

    hysteresis: float
    ratio_limits: tuple[tuple[int, float], ...]
    ratio_names: tuple[tuple[float, str], ...]
    sigmas: float
    horizon_s: float

    @classmethod
    def from_settings(cls, s: DetectionSettings) -> GrowthRules:
        return cls(hysteresis=s.hysteresis_pct / 100.0,
                   ratio_limits=tuple((rank, float(r)) for rank, r in enumerate(s.growth_ratios, 1)),
                   ratio_names=tuple((float(r), f"{r:g}x baseline") for r in s.growth_ratios),
                   sigmas=s.baseline_sigmas, horizon_s=s.trend_horizon_days * 86400.0)

    def judge(self, feature: Feature, value: float, baseline: Baseline, comparable: bool,
              speed_hz: float, trend: Trend | None, limits: ZoneLimits,
              left_out: Sweeping | InBand | None = None) -> FeatureVerdict:
        """The verdict on ``value`` (finite, >= 0) of ``feature`` in a reading at
        ``speed_hz`` (Hz), against its ``baseline`` (``comparable``: the speed lies within
        the baseline's band), its ``trend`` (None when the reading is left out of growth)
        and the point's zone ``limits``. A value ``left_out`` of the comparison (a sweep's
        reading, a 1x amplified by a mode) is judged by its zone only."""
        stats = baseline.stats
        status = baseline_status(baseline, comparable, speed_hz, left_out)
        ratio = None
        if status is READY and stats is not None and stats.median > 0:
            ratio = value / stats.median
        raise_rank = hold_rank = 0
        causes: list[Cause] = []
        limit: tuple[str, float] | None = None
        # The trend's limit is the next one its fitted line has to reach: one reading
        # above or below the line must not pick a limit the line has passed.
        level = value if trend is None else trend.fitted_now
        if feature is OVERALL:
            zone = zone_of(value, limits)
            raise_rank, hold_rank = self.zone_ranks(zone, value, limits)
            if raise_rank or hold_rank:
                causes.append(ZoneCause(zone, value))
            limit = boundary_above(zone, limits) if trend is None else first_boundary_above(level, limits)
        elif ratio is not None and stats is not None:
            limit = self.next_ratio_limit(level, stats.median)
        ttl = None if trend is None or limit is None else time_to_limit(trend, limit[1])
        if ratio is not None and stats is not None:
            ratio_raise, ratio_hold = level_ranks_above(ratio, self.ratio_limits, self.hysteresis)
            if ratio_raise and value <= stats.median + self.sigmas * stats.sigma:
                ratio_raise = 0  # within the baseline's own scatter
            if ratio_raise or ratio_hold:
                causes.append(RatioCause(ratio))
                raise_rank, hold_rank = max(raise_rank, ratio_raise), max(hold_rank, ratio_hold)
        # Trend: only towards limits that matter (B/C and C/D, or a ratio limit).
        if (ttl is not None and limit is not None and limit[0] != "A/B"
                and ttl <= self.horizon_s * (1 + self.hysteresis)):
            causes.append(TrendCause(limit[0], ttl))
            raise_rank = max(raise_rank, 1 if ttl <= self.horizon_s else 0)
            hold_rank = max(hold_rank, 1)
        return FeatureVerdict(feature, value, stats, status, ratio, trend, limit, ttl, raise_rank, hold_rank,
                              tuple(causes) if causes else ())

    def zone_ranks(self, zone: Zone, value_mm_s: float, limits: ZoneLimits) -> tuple[int, int]:
        """``(raise rank, hold rank)`` of the overall velocity (mm/s RMS) in ``zone``:
        raised by the zone itself (C alert, D severe), held above B/C or C/D lowered by
        the hysteresis."""
        raise_rank = _ZONE_RAISE_RANK.get(zone, 0)
        hold_rank = level_ranks_above(value_mm_s, ((2, limits.bc), (3, limits.cd)), self.hysteresis)[1]
        return raise_rank, hold_rank

    def next_ratio_limit(self, level: float, median: float) -> tuple[str, float] | None:
        """The first ratio limit (name, value in the feature's unit) above ``level`` (a
        value, or a trend's fitted level), for a baseline ``median``; None above them all."""
        for ratio, name in self.ratio_names:
            if level < ratio * median:
                return name, ratio * median
        return None
