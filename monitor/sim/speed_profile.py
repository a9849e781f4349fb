"""Running speed against time for the simulator: steady, ramps, drive set-point steps,
run-ups and coast-downs, joined end to end.

References
----------
Coast-down under constant friction plus a load torque growing with speed squared (fans,
pumps): d(Omega)/dt = -a - b Omega^2, solved in closed form (see
:meth:`SpeedProfile.coast_down`).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from monitor.model import validate


@dataclass(frozen=True)
class SpeedProfile:
    """Running speed against time, piecewise linear between breakpoints.

    ``times_s`` (s from the start, increasing, first 0) and ``speeds_hz`` (Hz, >= 0).
    Build with :meth:`steady`, :meth:`ramp`, :meth:`steps`, :meth:`run_up`,
    :meth:`coast_down`; join with :meth:`then`.
    """

    times_s: tuple[float, ...]
    speeds_hz: tuple[float, ...]

    def __post_init__(self) -> None:
        t = np.asarray(self.times_s, dtype=float)
        s = np.asarray(self.speeds_hz, dtype=float)
        if t.size < 2 or t.size != s.size:
            raise ValueError(
                f"times_s and speeds_hz must have the same length >= 2, got {t.size} and {s.size}."
            )
        if t[0] != 0.0 or np.any(np.diff(t) <= 0):
            raise ValueError("times_s must start at 0 and increase strictly.")
        if not np.all(np.isfinite(s)) or np.any(s < 0):
            raise ValueError("speeds_hz must be finite and >= 0.")

    @property
    def duration_s(self) -> float:
        return float(self.times_s[-1])

    def speed_at(self, t_s: np.ndarray | float) -> np.ndarray:
        """Speed (Hz) at times ``t_s`` (s from the start); held constant past the end."""
        return np.asarray(np.interp(t_s, self.times_s, self.speeds_hz))

    @classmethod
    def steady(cls, speed_hz: float, duration_s: float) -> SpeedProfile:
        """Constant speed, Hz, for ``duration_s`` s."""
        return cls((0.0, float(duration_s)), (float(speed_hz), float(speed_hz)))

    @classmethod
    def ramp(cls, start_hz: float, end_hz: float, duration_s: float) -> SpeedProfile:
        """Linear change from ``start_hz`` to ``end_hz`` over ``duration_s`` s."""
        return cls((0.0, float(duration_s)), (float(start_hz), float(end_hz)))

    @classmethod
    def steps(
        cls, setpoints_hz: Sequence[float], dwell_s: float, ramp_hz_per_s: float
    ) -> SpeedProfile:
        """Drive set-point steps: dwell ``dwell_s`` s at each set-point, moving between
        them at the drive's ramp rate ``ramp_hz_per_s`` (Hz/s)."""
        validate.positive(dwell_s, "dwell_s")
        validate.positive(ramp_hz_per_s, "ramp_hz_per_s")
        if not setpoints_hz:
            raise ValueError("setpoints_hz must list at least one speed.")
        times, speeds = [0.0], [float(setpoints_hz[0])]
        for nxt in setpoints_hz[1:]:
            times.append(times[-1] + dwell_s)
            speeds.append(speeds[-1])
            dt = abs(float(nxt) - speeds[-1]) / ramp_hz_per_s
            if dt > 0:
                times.append(times[-1] + dt)
                speeds.append(float(nxt))
        times.append(times[-1] + dwell_s)
        speeds.append(speeds[-1])
        return cls(tuple(times), tuple(speeds))

    @classmethod
    def run_up(cls, top_hz: float, duration_s: float, start_hz: float = 0.0) -> SpeedProfile:
        """Run-up at constant acceleration from ``start_hz`` to ``top_hz`` in ``duration_s`` s."""
        return cls.ramp(start_hz, top_hz, duration_s)

    @classmethod
    def coast_down(
        cls, start_hz: float, duration_s: float, friction_share: float = 0.2, points: int = 200
    ) -> SpeedProfile:
        """Coast-down to rest in ``duration_s`` s under constant friction plus a load
        torque growing with speed squared (fans, pumps).

        ``friction_share`` is the friction part of the decelerating torque at the start
        (0-1). With d(Omega)/dt = -a - b Omega^2 the speed is
        ``Omega(t) = sqrt(a/b) tan(atan(Omega0 sqrt(b/a)) - sqrt(ab) t)``.
        """
        validate.positive(start_hz, "start_hz")
        validate.positive(duration_s, "duration_s")
        validate.in_range(friction_share, "friction_share", 0.0, 1.0)
        rho = friction_share / (1.0 - friction_share)
        phi0 = math.atan(1.0 / math.sqrt(rho))
        t = np.linspace(0.0, duration_s, points)
        f = start_hz * math.sqrt(rho) * np.tan(phi0 - phi0 * t / duration_s)
        f[-1] = 0.0
        return cls(tuple(t.tolist()), tuple(np.maximum(f, 0.0).tolist()))

    def then(self, other: SpeedProfile) -> SpeedProfile:
        """This profile followed by ``other`` (shifted to start where this one ends)."""
        t0 = self.duration_s
        return SpeedProfile(
            self.times_s + tuple(t0 + t for t in other.times_s[1:]),
            self.speeds_hz + tuple(other.speeds_hz[1:]),
        )
