"""Forecast of a ramping running speed bringing an order excitation into a mode's required
band (:mod:`monitor.detection.margins`): the Theil-Sen trend of the latest speeds,
projected from the latest speed along its slope.

References
----------
H. Theil (1950), P. K. Sen, "Estimates of the regression coefficient based on Kendall's
tau", JASA 63 (1968): the speed trend (:func:`monitor.detection.growth.theil_sen`).
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np

from monitor.detection.growth import Trend, theil_sen
from monitor.detection.margins import order_label, required_margin
from monitor.model.registry import Machine


@dataclass(frozen=True)
class ApproachForecast:
    """Projected entry of an order excitation into a mode's required band.

    ``seconds`` until the excitation reaches the band edge ``edge_hz`` (Hz, excitation
    frequency) at the current speed slope ``speed_slope_hz_per_s`` (Hz/s, Theil-Sen);
    ``crossing_s`` the seconds the ramp would take to cross the whole band at that slope
    (shorter than the dwell a resonance alarm needs: a passage, not a dwell).
    """

    mode: str
    excitation: str
    edge_hz: float
    speed_at_entry_hz: float
    seconds: float
    speed_slope_hz_per_s: float
    crossing_s: float

    @property
    def subject(self) -> str:
        return f"{self.mode}@{self.excitation}"

    def to_json(self) -> dict:
        return {
            "mode": self.mode, "excitation": self.excitation, "edge_hz": self.edge_hz,
            "speed_at_entry_hz": self.speed_at_entry_hz, "seconds": self.seconds,
            "speed_slope_hz_per_s": self.speed_slope_hz_per_s, "crossing_s": self.crossing_s,
        }


def speed_trend(ts: Sequence[float], speed_hz: Sequence[float]) -> Trend:
    """Theil-Sen trend of running speed: slope (Hz/s) with its 95 % interval and the fitted
    speed at the last time (Hz), from times ``ts`` (epoch s) and speeds (Hz).

    References
    ----------
    Sen (1968), Theil (1950); same estimator as ``scipy.stats.theilslopes``.
    """
    t = np.asarray(ts, dtype=float)
    v = np.asarray(speed_hz, dtype=float)
    if t.shape != v.shape or t.size < 3:
        raise ValueError(f"ts and speed_hz must have the same length >= 3, got {t.size} and {v.size}.")
    slope, inter, lo, hi = theil_sen(t - t[-1], v)
    return Trend(slope, lo, hi, inter, t.size)


def speed_is_steady(speed_hz: Iterable[float]) -> bool:
    """True when the speeds (Hz) stay within 0.1 % of their largest: no ramp to forecast."""
    v = tuple(speed_hz)
    hi = max(v)
    return hi - min(v) <= 1e-3 * hi


def approach_forecasts(
    machine: Machine,
    ts: Sequence[float],
    speed_hz: Sequence[float],
    *,
    machine_default_pct: float | None = None,
) -> tuple[ApproachForecast, ...]:
    """Time until each order excitation enters a required band, for a ramping speed.

    Only pairs whose excitation is outside the band now and moving towards it are reported,
    and only when the 95 % interval of the Theil-Sen speed slope excludes zero (a real
    ramp, not noise), projecting from the latest speed along the slope. Fixed-frequency
    excitations (2x line) never move.
    """
    if len(ts) < 3 or speed_is_steady(speed_hz):
        return ()  # no ramp to project
    trend = speed_trend(ts, speed_hz)
    slope = trend.slope_per_s
    if trend.low_per_s <= 0.0 <= trend.high_per_s or slope == 0.0:
        return ()
    # From the latest measured speed: the median-based intercept lags behind on a ramp
    # that started inside the window.
    now = float(speed_hz[-1])
    out: list[ApproachForecast] = []
    for mode in machine.modes:
        req = required_margin(mode, machine_default_pct)
        if req.above_pct <= 0 and req.below_pct <= 0:
            continue
        lo_edge, hi_edge = req.band(float(mode.frequency_hz))
        for o in sorted(set(machine.excitation_orders)):
            f_now = o * now
            if slope > 0 and f_now <= lo_edge:
                edge = lo_edge
            elif slope < 0 and f_now >= hi_edge:
                edge = hi_edge
            else:
                continue
            s_entry = edge / o
            secs = (s_entry - now) / slope
            if secs >= 0:
                crossing = (hi_edge - lo_edge) / o / abs(slope)
                out.append(ApproachForecast(mode.name, order_label(o), edge, s_entry, secs, slope, crossing))
    return tuple(out)
