"""What the sweep plots of a passage show: 1x amplitude and phase against speed (Bode),
the same as a polar plot, and where the phase has turned through 90 degrees.

A passage stores its sweep's Bode points (monitor/store/passage_writes.py ``passage_values``:
``speed_hz``, ``amplitude`` and ``phase_deg``, the phase a lag unwrapped along the sweep).
Through a single mode the response lags the unbalance force by atan2(2 zeta r, 1 - r^2)
(r the ratio of running speed to natural frequency): near 0 well below the mode, 90
degrees at it and near 180 well above. The phase read against the key phasor carries a
constant offset besides (where the unbalance and the sensor sit), so the plots show the
phase change from the slowest point of the sweep, and the speed at which that change
passes 90 degrees estimates the natural frequency.

References
----------
W. T. Thomson and M. D. Dahleh, *Theory of Vibration with Applications*, 5th ed., section
3.3 (rotating unbalance: amplitude and phase against frequency ratio); API 684 (2005),
section 2.8 (Bode and polar plots of a run-up or coast-down). From memory.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np


@dataclass(frozen=True)
class SweepPlot:
    """The plotted series of one passage, each in the stored points' order (time).

    ``speed_hz`` (Hz), ``amplitude`` (the passage's unit, peak), ``phase_deg`` (lag,
    degrees, None without key phasor), ``phase_from_slowest_deg`` (``phase_deg`` less its value
    at the slowest point), ``polar_x`` and ``polar_y`` (amplitude at angle minus the lag:
    a growing lag turns clockwise), ``phase_90_hz`` (the speed where the phase change
    first reaches 90 degrees, by linear interpolation along speed; None when it never does).
    """

    speed_hz: list[float]
    amplitude: list[float]
    phase_deg: list[float] | None
    phase_from_slowest_deg: list[float] | None
    polar_x: list[float] | None
    polar_y: list[float] | None
    phase_90_hz: float | None

    def to_json(self) -> dict[str, Any]:
        return {"speed_hz": self.speed_hz, "amplitude": self.amplitude, "phase_deg": self.phase_deg,
                "phase_from_slowest_deg": self.phase_from_slowest_deg, "polar_x": self.polar_x,
                "polar_y": self.polar_y, "phase_90_hz": self.phase_90_hz}


def crossing_hz(speed_hz: Sequence[float], value: Sequence[float], level: float) -> float | None:
    """The first speed (Hz) at which the magnitude of ``value``, taken in ascending speed,
    reaches ``level``,
    interpolated linearly between the two points around it; None when it never does."""
    order = np.argsort(np.asarray(speed_hz, dtype=np.float64), kind="stable")
    s = np.asarray(speed_hz, dtype=np.float64)[order]
    v = np.abs(np.asarray(value, dtype=np.float64)[order])
    for i in range(1, s.size):
        if v[i - 1] < level <= v[i]:
            return float(s[i - 1] + (level - v[i - 1]) * (s[i] - s[i - 1]) / (v[i] - v[i - 1]))
    return None


def sweep_plot(points: Sequence[Mapping[str, Any]]) -> SweepPlot:
    """The sweep plots of a passage's stored Bode points (``speed_hz``, ``amplitude``,
    ``phase_deg`` each; the phase null throughout when the sweep had no key phasor)."""
    speed = [float(p["speed_hz"]) for p in points]
    amp = [float(p["amplitude"]) for p in points]
    phases = [p.get("phase_deg") for p in points]
    if not points or any(ph is None or not math.isfinite(float(ph)) for ph in phases):
        return SweepPlot(speed, amp, None, None, None, None, None)
    phase = [float(ph) for ph in phases]  # type: ignore[arg-type]
    ref = phase[int(np.argmin(speed))]
    change = [ph - ref for ph in phase]
    rad = np.radians(phase)
    a = np.asarray(amp)
    return SweepPlot(speed, amp, phase, change, (a * np.cos(rad)).tolist(), (-a * np.sin(rad)).tolist(),
                     crossing_hz(speed, change, 90.0))
