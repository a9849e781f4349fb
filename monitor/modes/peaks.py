"""Reading a resonance peak off sampled data: its vertex and its half-power points.

Shared by the impact test (:mod:`monitor.modes.impact`, peaks of a frequency response)
and the run-up (:mod:`monitor.modes.runup`, peaks of 1x amplitude against speed).

References
----------
W. T. Thomson, *Theory of Vibration with Applications*: half-power points and bandwidth.
API Standard 684, *Rotordynamic Tutorial*: the half-power level 0.707 x peak amplitude.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import ArrayLike

#: Half-power level: amplitude / sqrt(2), i.e. -3.01 dB (API 684: 0.707 x peak).
HALF_POWER = 1.0 / math.sqrt(2.0)


def half_power_points(
    freq_hz: ArrayLike, magnitude: ArrayLike, peak_index: int, *,
    lo_index: int | None = None, hi_index: int | None = None, peak_value: float | None = None,
) -> tuple[float, float] | None:
    """Frequencies (Hz) where ``magnitude`` falls to peak / sqrt(2) either side of a peak.

    Walks out from ``peak_index`` (not past ``lo_index`` / ``hi_index``, e.g. the valleys
    to the neighbouring modes) and interpolates linearly between the two samples that
    straddle the -3 dB level. Returns None when either side does not fall that far.

    References
    ----------
    Thomson, half-power points and bandwidth; API 684 (0.707 x peak amplitude).
    """
    f = np.asarray(freq_hz, dtype=float)
    m = np.asarray(magnitude, dtype=float)
    if f.shape != m.shape or f.ndim != 1:
        raise ValueError(
            f"freq_hz and magnitude must be 1-D arrays of one length, got {f.shape} and {m.shape}."
        )
    k = int(peak_index)
    if not 0 <= k < m.size:
        raise ValueError(f"peak_index must lie in [0, {m.size}), got {peak_index!r}.")
    lo = 0 if lo_index is None else max(0, int(lo_index))
    hi = m.size - 1 if hi_index is None else min(m.size - 1, int(hi_index))
    level = (m[k] if peak_value is None else float(peak_value)) * HALF_POWER
    f1 = f2 = None
    i = k
    while i > lo and m[i - 1] >= level:
        i -= 1
    if i > lo:  # m[i-1] < level <= m[i]
        a, b = i - 1, i
        f1 = f[a] + (level - m[a]) / (m[b] - m[a]) * (f[b] - f[a])
    j = k
    while j < hi and m[j + 1] >= level:
        j += 1
    if j < hi:  # m[j] >= level > m[j+1]
        a, b = j, j + 1
        f2 = f[a] + (m[a] - level) / (m[a] - m[b]) * (f[b] - f[a])
    if f1 is None or f2 is None or not f2 > f1:
        return None
    return float(f1), float(f2)


def parabola_vertex(x: np.ndarray, y: np.ndarray, k: int) -> tuple[float, float]:
    """Vertex (x, y) of the parabola through points k-1, k, k+1 (any spacing)."""
    if k <= 0 or k >= y.size - 1:
        return float(x[k]), float(y[k])
    xs, ys = x[k - 1 : k + 2], y[k - 1 : k + 2]
    c2, c1, c0 = np.polyfit(xs - xs[1], ys, 2)
    if c2 >= 0:
        return float(x[k]), float(y[k])
    dx = float(np.clip(-c1 / (2.0 * c2), xs[0] - xs[1], xs[2] - xs[1]))
    return float(xs[1] + dx), float(c0 + c1 * dx + c2 * dx * dx)
