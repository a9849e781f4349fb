"""Run-up and coast-down: 1x amplitude and phase against speed, and the resonance passages.

:class:`BodeData` holds an order's amplitude and phase against speed (:func:`order_point`
computes one point from a waveform); :func:`find_passages` finds the resonance passages:
amplitude peak, phase at the peak, amplification factor from the half-power speeds (API
684: ``AF = N_c / (N_2 - N_1)``).

Speeds in Hz (rev/s) unless the name says ``rpm`` (r/min). Phase: degrees of lag behind
the once-per-revolution reference (the convention of :mod:`monitor.analysis.orders`),
unwrapped along the speed axis.

References
----------
API Standard 684, *Rotordynamic Tutorial*: amplification factor by the half-power method.
W. T. Thomson, *Theory of Vibration with Applications*: the response lags the force by
90 deg at resonance.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
from numpy.typing import ArrayLike
from scipy import signal

from monitor.analysis.orders import order_amplitudes
from monitor.model import validate
from monitor.model.registry import Mode
from monitor.modes.peaks import half_power_points, parabola_vertex


@dataclass(frozen=True, eq=False)
class BodeData:
    """Order amplitude and phase against running speed (a Bode plot's data).

    ``speed_hz`` (Hz) in the order recorded; ``amplitude`` peak in ``unit``; ``phase_deg``
    lag behind the once-per-revolution reference, degrees, unwrapped, or None without a
    reference; ``order`` (1.0 = 1x).
    """

    speed_hz: np.ndarray
    amplitude: np.ndarray
    phase_deg: np.ndarray | None
    unit: str = ""
    order: float = 1.0

    @property
    def speed_rpm(self) -> np.ndarray:
        return self.speed_hz * 60.0

    @property
    def direction(self) -> Literal["run-up", "coast-down"]:
        """'run-up' when speed rises from first to last point, else 'coast-down'."""
        return "run-up" if self.speed_hz[-1] >= self.speed_hz[0] else "coast-down"

    def to_json(self) -> dict[str, Any]:
        """``{"order", "unit", "direction", "speed_hz": [...], "speed_rpm": [...],
        "amplitude": [...], "phase_deg": [...] | null}``."""
        return {
            "order": self.order,
            "unit": self.unit,
            "direction": self.direction,
            "speed_hz": self.speed_hz.tolist(),
            "speed_rpm": self.speed_rpm.tolist(),
            "amplitude": self.amplitude.tolist(),
            "phase_deg": None if self.phase_deg is None else self.phase_deg.tolist(),
        }


def bode_data(
    speed_hz: ArrayLike,
    amplitude: ArrayLike,
    phase_deg: ArrayLike | None = None,
    *,
    unit: str = "",
    order: float = 1.0,
) -> BodeData:
    """Validated :class:`BodeData` from speed (Hz), amplitude (peak, ``unit``) and phase
    (degrees, any wrapping; unwrapped here along the recorded order)."""
    s = np.asarray(speed_hz, dtype=float)
    a = np.asarray(amplitude, dtype=float)
    if s.ndim != 1 or s.shape != a.shape or s.size < 5:
        raise ValueError(
            f"speed_hz and amplitude must be 1-D of one length >= 5, got {s.shape} and {a.shape}."
        )
    if not (np.isfinite(s).all() and (s >= 0).all()):
        raise ValueError("speed_hz must be finite and >= 0 everywhere.")
    if not (np.isfinite(a).all() and (a >= 0).all()):
        raise ValueError("amplitude must be finite and >= 0 everywhere.")
    p = None
    if phase_deg is not None:
        p = np.asarray(phase_deg, dtype=float)
        if p.shape != s.shape or not np.isfinite(p).all():
            raise ValueError(
                f"phase_deg must be finite with the shape of speed_hz {s.shape}, got {p.shape}."
            )
        p = np.unwrap(p, period=360.0)
    o = validate.positive(order, "order")
    return BodeData(s, a, p, unit, o)


def order_point(
    samples: ArrayLike,
    fs_hz: float,
    unit: str,
    speed_hz: float | None,
    *,
    reference_s: float | None = None,
    once_per_rev_s: ArrayLike | None = None,
    order: float = 1.0,
) -> tuple[float, float | None]:
    """Amplitude (peak, ``unit``) and phase (degrees, or None without a reference pulse)
    of one order in one waveform, by :func:`monitor.analysis.orders.order_amplitudes`
    (a pulse train ``once_per_rev_s`` gives the speed and the phase reference)."""
    oa = order_amplitudes(samples, fs_hz, unit, speed_hz, (order,), reference_s=reference_s,
                          once_per_rev_s=once_per_rev_s)
    if not oa:
        raise ValueError(f"order {order:g} x the running speed is at or above the Nyquist frequency.")
    return oa[0].amplitude, oa[0].phase_deg


@dataclass(frozen=True)
class Passage:
    """One resonance passage in a run-up or coast-down.

    Attributes
    ----------
    critical_speed_hz : float
        Speed of the amplitude peak, Hz (parabola through the three highest points).
    peak_amplitude : float
        In the Bode data's unit.
    half_power_speeds_hz : (float, float) or None
        N1, N2: speeds where the amplitude is 0.707 x peak, Hz.
    amplification_factor : float or None
        API 684: ``N_c / (N2 - N1)``.
    damping_ratio : float or None
        ``1 / (2 AF)`` (light damping).
    phase_at_peak_deg : float or None
        Phase at the critical speed, degrees (unwrapped; 90 deg + the phase far below the
        resonance for a single mode).
    phase_change_deg : float or None
        Phase change from N1 to N2 (about 90 deg through a single mode), degrees.
    direction : {'run-up', 'coast-down'}
    order : float
    """

    critical_speed_hz: float
    peak_amplitude: float
    half_power_speeds_hz: tuple[float, float] | None
    amplification_factor: float | None
    damping_ratio: float | None
    phase_at_peak_deg: float | None
    phase_change_deg: float | None
    direction: Literal["run-up", "coast-down"]
    order: float = 1.0

    @property
    def critical_speed_rpm(self) -> float:
        return self.critical_speed_hz * 60.0

    @property
    def frequency_hz(self) -> float:
        """The mode's frequency, Hz: critical speed x order."""
        return self.critical_speed_hz * self.order

    def as_mode(self, name: str, *, date: Any = None) -> Mode:
        return Mode(
            name=name, frequency_hz=self.frequency_hz,
            damping_ratio=self.damping_ratio if self.damping_ratio and self.damping_ratio < 1
            else None,
            amplification_factor=self.amplification_factor,
            source=self.direction, date=date,
        )

    def to_json(self) -> dict[str, Any]:
        return {
            "critical_speed_hz": self.critical_speed_hz,
            "critical_speed_rpm": self.critical_speed_rpm,
            "frequency_hz": self.frequency_hz,
            "peak_amplitude": self.peak_amplitude,
            "half_power_speeds_hz": (
                list(self.half_power_speeds_hz) if self.half_power_speeds_hz else None),
            "amplification_factor": self.amplification_factor,
            "damping_ratio": self.damping_ratio,
            "phase_at_peak_deg": self.phase_at_peak_deg,
            "phase_change_deg": self.phase_change_deg,
            "direction": self.direction,
            "order": self.order,
        }


def find_passages(
    bode: BodeData, *, prominence: float = 0.3, max_passages: int = 4
) -> tuple[Passage, ...]:
    """Resonance passages in a run-up or coast-down.

    The points are sorted by speed; a passage is an amplitude peak that stands out by
    ``prominence`` x the largest amplitude. For each: the critical speed (parabolic
    vertex), the half-power speeds N1, N2 (linear interpolation, not past the valleys to
    neighbouring peaks), AF by API 684, and the phase at the peak and its change from N1
    to N2 when phases exist.

    References
    ----------
    API 684: amplification factor ``N_c / (N2 - N1)`` with N1, N2 at 0.707 x peak.
    Thomson: the response lags the force by 90 deg at resonance.
    """
    if not isinstance(bode, BodeData):
        raise ValueError(f"bode must be a BodeData, got {type(bode).__name__}.")
    prom = validate.in_range(prominence, "prominence", 0.0, 1.0)
    validate.whole_number(max_passages, "max_passages")
    srt = np.argsort(bode.speed_hz, kind="stable")
    s, a = bode.speed_hz[srt], bode.amplitude[srt]
    ph = None if bode.phase_deg is None else bode.phase_deg[srt]
    top = float(a.max())
    if not top > 0:
        return ()
    pk, _ = signal.find_peaks(np.concatenate([[0.0], a, [0.0]]), prominence=prom * top)
    pk = pk - 1
    if pk.size == 0:
        return ()
    pk = np.sort(pk[np.argsort(a[pk])[::-1][:max_passages]])
    bounds = [0] + [int(p + np.argmin(a[p : q + 1])) for p, q in zip(pk[:-1], pk[1:], strict=True)]
    bounds.append(a.size - 1)
    out = []
    for j, k in enumerate(pk):
        nc, peak = parabola_vertex(s, a, int(k))
        hp = half_power_points(s, a, int(k), lo_index=bounds[j], hi_index=bounds[j + 1],
                               peak_value=peak)
        af = zeta = None
        if hp is not None:
            af = nc / (hp[1] - hp[0])
            zeta = 1.0 / (2.0 * af)
        p_peak = p_change = None
        if ph is not None:
            p_peak = float(np.interp(nc, s, ph))
            if hp is not None:
                p_change = float(abs(np.interp(hp[1], s, ph) - np.interp(hp[0], s, ph)))
        out.append(Passage(nc, peak, hp, af, zeta, p_peak, p_change, bode.direction, bode.order))
    return tuple(out)
