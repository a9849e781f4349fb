"""Amplitude growth statistics: a robust baseline and a robust trend per feature.

- Baseline: median and MAD (median absolute deviation) of the first ``size`` accepted
  readings after a (re)start; then frozen until an engineer restarts it (after
  maintenance, say). Median and MAD ignore a minority of outliers, so a few odd readings
  during learning do not move the baseline.
- Trend: Theil-Sen slope (median of pairwise slopes) over a sliding window of the latest
  readings, and the projected time until the fitted value reaches a limit.

Everything here is plain data that snapshots to a JSON-able dict and restores.

References
----------
F. R. Hampel, "The influence curve and its role in robust estimation", JASA 69 (1974):
MAD; 1.4826 x MAD estimates the standard deviation of normal data.
H. Theil (1950), P. K. Sen, "Estimates of the regression coefficient based on Kendall's
tau", JASA 63 (1968); checked against ``scipy.stats.theilslopes``.
"""

from __future__ import annotations

import math
from collections import deque
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

#: Scale of MAD to a normal standard deviation (1 / Phi^-1(3/4)).
MAD_TO_SIGMA = 1.482602218505602


@dataclass(frozen=True)
class BaselineStats:
    """Median and MAD of the learning window, in the feature's unit; ``count`` readings."""

    median: float
    mad: float
    count: int

    @property
    def sigma(self) -> float:
        """Robust standard deviation, 1.4826 x MAD."""
        return MAD_TO_SIGMA * self.mad


class Baseline:
    """A restartable robust baseline for one feature.

    Parameters
    ----------
    size : int
        Readings in the learning window (>= 3).
    """

    def __init__(self, size: int = 20) -> None:
        if not isinstance(size, int) or size < 3:
            raise ValueError(f"size must be an integer >= 3 readings, got {size!r}.")
        self.size = size
        self.values: list[float] = []
        self.speeds: list[float] = []
        self.started_at: float | None = None
        self._stats: BaselineStats | None = None

    @property
    def ready(self) -> bool:
        return self._stats is not None

    @property
    def stats(self) -> BaselineStats | None:
        return self._stats

    @property
    def speed_hz(self) -> float | None:
        """Median running speed of the learning readings (Hz), once learned."""
        return float(np.median(self.speeds)) if self.ready and self.speeds else None

    def restart(self, ts: float | None = None) -> None:
        """Forget the learned baseline and learn again from the next readings."""
        self.values.clear()
        self.speeds.clear()
        self._stats = None
        self.started_at = ts

    def add(self, value: float, speed_hz: float | None = None, ts: float | None = None) -> bool:
        """Feed one accepted reading while learning; returns True once the baseline is ready."""
        if self._stats is not None:
            return True
        v = float(value)
        if not math.isfinite(v):
            return False
        if self.started_at is None:
            self.started_at = ts
        self.values.append(v)
        if speed_hz is not None:
            self.speeds.append(float(speed_hz))
        if len(self.values) >= self.size:
            arr = np.asarray(self.values)
            med = float(np.median(arr))
            self._stats = BaselineStats(med, float(np.median(np.abs(arr - med))), arr.size)
        return self._stats is not None

    def ratio(self, value: float) -> float | None:
        """Value over the baseline median, or None while learning or for a zero median."""
        if self._stats is None or self._stats.median <= 0:
            return None
        return float(value) / self._stats.median

    def snapshot(self) -> dict:
        return {"size": self.size, "values": list(self.values), "speeds": list(self.speeds),
                "started_at": self.started_at}

    @classmethod
    def restore(cls, data: dict) -> Baseline:
        b = cls(int(data["size"]))
        b.started_at = data.get("started_at")
        for i, v in enumerate(data.get("values", [])):
            sp = data.get("speeds", [])
            b.add(v, sp[i] if i < len(sp) else None)
        return b


@dataclass(frozen=True)
class Trend:
    """Theil-Sen trend of a feature.

    ``slope_per_s`` (feature unit per second) with its 95 % interval ``low_per_s`` /
    ``high_per_s``; ``fitted_now`` is the fitted value at the latest reading's time;
    ``n`` readings used.
    """

    slope_per_s: float
    low_per_s: float
    high_per_s: float
    fitted_now: float
    n: int

    @property
    def slope_per_day(self) -> float:
        return self.slope_per_s * 86400.0

    @property
    def rising(self) -> bool:
        """The 95 % interval of the slope lies above zero."""
        return self.low_per_s > 0.0


#: Standard normal quantile for a two-sided 95 % interval, Phi^-1(0.025).
_Z_95 = -1.959963984540054


def _tie_term(sorted_a: np.ndarray) -> float:
    """Sum of k (k - 1) (2k + 5) over groups of k equal values (Sen 1968, eq. 2.6)."""
    same = sorted_a[1:] == sorted_a[:-1]
    if not same.any():
        return 0.0
    edges = np.flatnonzero(np.diff(np.concatenate(([0], same.view(np.int8), [0]))))
    k = (edges[1::2] - edges[::2] + 1).astype(float)
    return float(np.sum(k * (k - 1) * (2 * k + 5)))


def _sorted_median(a: np.ndarray) -> float:
    n = a.size
    m = n // 2
    return float(a[m]) if n % 2 else float(0.5 * (a[m - 1] + a[m]))


_PAIRS: dict[int, tuple[np.ndarray, np.ndarray]] = {}


def theil_sen(x: np.ndarray, y: np.ndarray) -> tuple[float, float, float, float]:
    """Theil-Sen fit ``(slope, intercept, low_slope, high_slope)`` with a 95 % interval.

    The same estimator and interval as ``scipy.stats.theilslopes`` (method 'separate':
    intercept = median(y) - slope * median(x); interval by Sen's equation 2.6 with ties),
    written out because the scipy call spends most of its ~1 ms in the normal quantile, and
    detection runs it for every feature of every reading. tests/test_growth.py checks it
    against ``scipy.stats.theilslopes``.

    References
    ----------
    Sen, "Estimates of the regression coefficient based on Kendall's tau", JASA 63 (1968),
    eq. 2.6; ``scipy.stats.theilslopes``.
    """
    return theil_sen_many(np.asarray(x, dtype=float), np.asarray(y, dtype=float)[None, :])[0]


def theil_sen_many(x: np.ndarray, ys: np.ndarray) -> list[tuple[float, float, float, float]]:
    """:func:`theil_sen` of each row of ``ys`` (shape (F, n)) against one ``x`` (n,)."""
    n = x.size
    if ys.ndim != 2 or ys.shape[1] != n:
        raise ValueError(f"ys must have shape (F, {n}), got {ys.shape}.")
    pairs = _PAIRS.get(n)
    if pairs is None:
        pairs = _PAIRS[n] = np.triu_indices(n, 1)
    i, j = pairs
    dx = x[j] - x[i]
    # Each unordered pair once; its slope is the same in either order (scipy keeps the
    # ordering with dx > 0), and pairs with equal x give no slope.
    keep = dx != 0
    if not keep.any():
        raise ValueError("x must not be all identical.")
    if not keep.all():
        i, j, dx = i[keep], j[keep], dx[keep]
    slopes = (ys[:, j] - ys[:, i]) / dx
    slopes.sort(axis=1)
    nt = slopes.shape[1]
    xs = np.sort(x)
    yss = np.sort(ys, axis=1)
    med = _sorted_median_rows(slopes)
    inter = _sorted_median_rows(yss) - med * _sorted_median(xs)
    base = n * (n - 1) * (2 * n + 5) - _tie_term(xs)
    y_ties = (yss[:, 1:] == yss[:, :-1]).any(axis=1)
    out = []
    for r in range(ys.shape[0]):
        sigsq = (base - (_tie_term(yss[r]) if y_ties[r] else 0.0)) / 18.0
        if not sigsq > 0:
            out.append((float(med[r]), float(inter[r]), math.nan, math.nan))
            continue
        zs = _Z_95 * math.sqrt(sigsq)
        ru = min(int(round((nt - zs) / 2.0)), nt - 1)
        rl = max(int(round((nt + zs) / 2.0)) - 1, 0)
        out.append((float(med[r]), float(inter[r]), float(slopes[r, rl]), float(slopes[r, ru])))
    return out


def _sorted_median_rows(a: np.ndarray) -> np.ndarray:
    m = a.shape[1] // 2
    return a[:, m] if a.shape[1] % 2 else 0.5 * (a[:, m - 1] + a[:, m])


def theil_sen_trend(ts: Sequence[float], values: Sequence[float]) -> Trend:
    """Theil-Sen trend of ``values`` against ``ts`` (epoch seconds); see :func:`theil_sen`."""
    t = np.asarray(ts, dtype=float)
    v = np.asarray(values, dtype=float)
    if t.ndim != 1 or t.shape != v.shape or t.size < 3:
        raise ValueError(f"ts and values must be 1-D of equal length >= 3, got {t.shape} and {v.shape}.")
    if not (np.all(np.isfinite(t)) and np.all(np.isfinite(v))):
        raise ValueError("ts and values must be finite.")
    if np.ptp(t) <= 0:
        raise ValueError("ts must span a positive time.")
    # Time relative to the latest reading, so the intercept is the fitted value now.
    slope, inter, lo, hi = theil_sen(t - t[-1], v)
    return Trend(slope, lo, hi, inter, int(t.size))


def time_to_limit(trend: Trend, limit: float) -> float | None:
    """Seconds from the latest reading until the fitted trend reaches ``limit``.

    0 when already at or above it; None when the trend is not rising (95 % interval of
    the slope includes zero or lies below it).
    """
    if trend.fitted_now >= limit:
        return 0.0
    if not trend.rising or trend.slope_per_s <= 0:
        return None
    return (float(limit) - trend.fitted_now) / trend.slope_per_s


class TrendWindow:
    """Sliding window of (ts, value) for a Theil-Sen trend; ``size`` readings kept,
    ``min_readings`` before a trend is given."""

    def __init__(self, size: int = 50, min_readings: int = 10) -> None:
        if not isinstance(size, int) or size < 3:
            raise ValueError(f"size must be an integer >= 3 readings, got {size!r}.")
        if not isinstance(min_readings, int) or not 3 <= min_readings <= size:
            raise ValueError(f"min_readings must be an integer in [3, size], got {min_readings!r}.")
        self.size = size
        self.min_readings = min_readings
        self.ts: deque[float] = deque(maxlen=size)
        self.values: deque[float] = deque(maxlen=size)

    def add(self, ts: float, value: float) -> None:
        if math.isfinite(value) and math.isfinite(ts) and (not self.ts or ts > self.ts[-1]):
            self.ts.append(float(ts))
            self.values.append(float(value))

    def clear(self) -> None:
        self.ts.clear()
        self.values.clear()

    def trend(self) -> Trend | None:
        if len(self.ts) < self.min_readings:
            return None
        return theil_sen_trend(list(self.ts), list(self.values))

    def snapshot(self) -> dict:
        return {"size": self.size, "min_readings": self.min_readings,
                "ts": list(self.ts), "values": list(self.values)}

    @classmethod
    def restore(cls, data: dict) -> TrendWindow:
        w = cls(int(data["size"]), int(data["min_readings"]))
        for t, v in zip(data.get("ts", []), data.get("values", []), strict=False):
            w.add(t, v)
        return w
