"""Detection settings of one machine: the keys of its registry table that tune detection.

The field names are the registry keys (docs/alarms.md, "Settings"); every door into the
registry checks them through :func:`monitor.model.bounds.check_machine`, and the detection
stage (:mod:`monitor.detection.evaluator`) reads them from here.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, fields
from typing import Any


@dataclass(frozen=True)
class DetectionSettings:
    """Detection settings of one machine; the field names are the registry keys.

    Attributes
    ----------
    required_margin_pct : float or None
        Machine default required margin (%) for modes with no AF, damping or own margin;
        None uses 10 % (common practice).
    approach_factor : float
        Approach band as a multiple of the required margin (default 1.5).
    persistence : int
        Consecutive readings before a raise, escalation, de-escalation or clear (3).
    hysteresis_pct : float
        A condition holds until the value falls this many percent inside its limit (10 %).
    baseline_readings : int
        Readings in the baseline learning window (20).
    growth_ratios : tuple of two floats
        Baseline ratios for advisory and alert (2, 4: +6 dB, +12 dB, common practice).
    baseline_speed_band_pct : float
        Speed-dependent features are compared with the baseline only within this speed
        band, percent of the baseline speed (10 %).
    baseline_sigmas : float
        A ratio alarm also needs the value this many robust standard deviations (1.4826 x
        MAD) above the baseline median, so a noisy feature does not alarm on noise (3).
    trend_window : int
        Readings in the sliding Theil-Sen window (50).
    trend_min_readings : int
        Readings before a trend is given (10).
    trend_horizon_days : float
        Alarm when the projected time to the next limit is shorter (7 days).
    trend_refit_every : int
        Refit the Theil-Sen trend after this many new readings; in between its line is
        carried forward (5).
    approach_warning_s : float
        Advisory when a ramping speed brings an excitation into a required band within
        this time, seconds (600).
    resonance_dwell_s : float
        A resonance level is raised only once the excitation has stayed in its band this
        long, seconds (60; 0 to 86,400): a run-up or coast-down passing through faster is
        a passage, not an alarm; readings taken during such a sweep are left out of growth.
    speed_history : int
        Speed values kept for the speed trend (12).
    reading_interval_s : float or None
        Expected time between readings of a point, seconds; None learns it (median of
        the last intervals).
    stale_intervals : float
        A point is stale after this many expected intervals without a reading (3).
    min_running_speed_hz : float or None
        Below this running speed, Hz, the machine is stopped (monitor/detection/running.py);
        None takes the bottom of the registry's ``speed_range_rpm``.
    stopped_overall_mm_s : float
        With no measured speed, below this overall velocity, mm/s RMS, a reading is taken
        with the machine stopped (0.3, common practice; 0 turns the level test off).
    """

    required_margin_pct: float | None = None
    approach_factor: float = 1.5
    persistence: int = 3
    hysteresis_pct: float = 10.0
    baseline_readings: int = 20
    growth_ratios: tuple[float, float] = (2.0, 4.0)
    baseline_speed_band_pct: float = 10.0
    baseline_sigmas: float = 3.0
    trend_window: int = 50
    trend_min_readings: int = 10
    trend_horizon_days: float = 7.0
    trend_refit_every: int = 5
    approach_warning_s: float = 600.0
    resonance_dwell_s: float = 60.0
    speed_history: int = 12
    reading_interval_s: float | None = None
    stale_intervals: float = 3.0
    min_running_speed_hz: float | None = None
    stopped_overall_mm_s: float = 0.3

    @classmethod
    def from_mapping(cls, settings: Mapping[str, Any], where: str = "settings") -> DetectionSettings:
        """Build from registry keys, ignoring keys that are not detection settings;
        ValueError naming the key for a bad value."""
        names = {f.name for f in fields(cls)}
        kw = {k: v for k, v in settings.items() if k in names}
        if "growth_ratios" in kw and isinstance(kw["growth_ratios"], list):
            kw["growth_ratios"] = tuple(kw["growth_ratios"])
        s = cls(**kw)
        s.validate(where)
        return s

    def validate(self, where: str = "settings") -> None:
        """Check every setting's type and range; ValueError naming ``where`` and the key."""
        def num(name: str, lo: float, hi: float = math.inf, *, integer: bool = False,
                lo_open: bool = False) -> None:
            v = getattr(self, name)
            ok = isinstance(v, int | float) and not isinstance(v, bool) and math.isfinite(v)
            ok = ok and (v > lo if lo_open else v >= lo) and v <= hi
            if integer:
                ok = ok and isinstance(v, int)
            if not ok:
                kind = "an integer" if integer else "a number"
                bound = f"> {lo:g}" if lo_open else f">= {lo:g}"
                raise ValueError(f"{where}: '{name}' must be {kind} {bound}"
                                 f"{'' if hi == math.inf else f' and <= {hi:g}'}, got {v!r}.")

        if self.required_margin_pct is not None:
            num("required_margin_pct", 0.0, 99.0)
        num("approach_factor", 1.0)
        num("persistence", 1, integer=True)
        num("hysteresis_pct", 0.0, 90.0)
        num("baseline_readings", 3, integer=True)
        num("baseline_speed_band_pct", 0.0, lo_open=True)
        num("baseline_sigmas", 0.0)
        num("trend_window", 3, integer=True)
        num("trend_min_readings", 3, self.trend_window, integer=True)
        num("trend_horizon_days", 0.0, lo_open=True)
        num("trend_refit_every", 1, integer=True)
        num("approach_warning_s", 0.0)
        num("resonance_dwell_s", 0.0, 86400.0)
        num("speed_history", 3, integer=True)
        num("stale_intervals", 1.0)
        num("stopped_overall_mm_s", 0.0, 100.0)
        if self.min_running_speed_hz is not None:
            num("min_running_speed_hz", 0.0, lo_open=True)
        if self.reading_interval_s is not None:
            num("reading_interval_s", 0.0, lo_open=True)
        r = self.growth_ratios
        if (not isinstance(r, tuple) or len(r) != 2
                or not all(isinstance(x, int | float) and math.isfinite(x) for x in r)
                or not 1.0 < r[0] < r[1]):
            raise ValueError(f"{where}: 'growth_ratios' must be two increasing numbers above 1, got {r!r}.")
