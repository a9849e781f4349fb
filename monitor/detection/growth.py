"""Amplitude growth statistics: a robust baseline and a robust trend per feature.

- Baseline: median and MAD (median absolute deviation) of the first ``size`` accepted
  readings after a (re)start; then frozen until an engineer restarts it (after
  maintenance, say). Median and MAD ignore a minority of outliers, so a few odd readings
  during learning do not move the baseline.
- Trend: Theil-Sen slope (median of pairwise slopes) over a sliding window of the latest
  readings, and the projected time until the fitted value reaches a limit.

Everything here is plain data that snapshots to a JSON-able dict and restores exactly
(non-finite floats as tagged strings, :mod:`monitor.detection.state_json`).

References
----------
F. R. Hampel, "The influence curve and its role in robust estimation", JASA 69 (1974):
MAD; 1.4826 x MAD estimates the standard deviation of normal data.
H. Theil (1950), P. K. Sen, "Estimates of the regression coefficient based on Kendall's
tau", JASA 63 (1968); checked against ``scipy.stats.theilslopes``.
"""

from __future__ import annotations

import itertools
import math
from collections import deque
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, NamedTuple

import numpy as np

from monitor.detection.state_json import float_in, float_out, floats_in, floats_out

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

    # ``stats`` (None while learning) and ``speed_hz`` (median running speed of the
    # learning readings, Hz, once learned) are plain attributes for reading only: detection
    # reads them for every feature of every reading.
    __slots__ = ("size", "values", "speeds", "started_at", "stats", "speed_hz")

    def __init__(self, size: int = 20) -> None:
        if not isinstance(size, int) or size < 3:
            raise ValueError(f"size must be an integer >= 3 readings, got {size!r}.")
        self.size = size
        self.values: list[float] = []
        self.speeds: list[float] = []
        self.started_at: float | None = None
        self.stats: BaselineStats | None = None
        self.speed_hz: float | None = None

    @property
    def ready(self) -> bool:
        return self.stats is not None

    def restart(self, ts: float | None = None) -> None:
        """Forget the learned baseline and learn again from the next readings."""
        self.values.clear()
        self.speeds.clear()
        self.stats = None
        self.speed_hz = None
        self.started_at = ts

    def add(self, value: float, speed_hz: float | None = None, ts: float | None = None) -> bool:
        """Feed one accepted reading while learning; returns True once the baseline is ready."""
        if self.stats is not None:
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
            self.stats = BaselineStats(med, float(np.median(np.abs(arr - med))), arr.size)
            self.speed_hz = float(np.median(self.speeds)) if self.speeds else None
        return self.stats is not None

    def ratio(self, value: float) -> float | None:
        """Value over the baseline median, or None while learning or for a zero median."""
        if self.stats is None or self.stats.median <= 0:
            return None
        return float(value) / self.stats.median

    def snapshot(self) -> dict:
        """Exact JSON data (:mod:`monitor.detection.state_json`); ``values`` are finite by
        :meth:`add`, the speeds may be anything the caller gave."""
        return {"size": self.size, "values": list(self.values), "speeds": floats_out(self.speeds),
                "started_at": float_out(self.started_at)}

    @classmethod
    def restore(cls, data: dict) -> Baseline:
        """Rebuild from :meth:`snapshot`: the learning readings are fed again, so the
        statistics are those the same arithmetic gave before."""
        b = cls(int(data["size"]))
        b.started_at = float_in(data.get("started_at"))
        sp = floats_in(data.get("speeds", []))
        for i, v in enumerate(floats_in(data.get("values", []))):
            b.add(v, sp[i] if i < len(sp) else None)
        return b


class Trend(NamedTuple):
    """Theil-Sen trend of a feature (immutable; a named tuple because detection makes one
    per feature at every refit and a tuple is made at a fraction of a frozen dataclass's
    cost).

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


def sorted_median(a: np.ndarray) -> float:
    """Median of an ascending 1-D array (the same arithmetic as np.median)."""
    return median_at(a, a.size)


def median_at(at: Any, n: int) -> float:
    """Median of ``n`` ascending values, ``at[k]`` giving the k-th: an array, or a mapping
    holding only the ranks (n - 1) // 2 and n // 2 (order statistics selected without a
    sort)."""
    m = n // 2
    return float(at[m]) if n % 2 else float(0.5 * (at[m - 1] + at[m]))


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


def theil_sen_many(x: np.ndarray, ys: np.ndarray, *, x_increasing: bool = False
                   ) -> list[tuple[float, float, float, float]]:
    """:func:`theil_sen` of each row of ``ys`` (shape (F, n)) against one ``x`` (n,).

    ``x_increasing`` tells that ``x`` is strictly increasing (a time axis), which spares
    sorting it and looking for pairs without a slope; the results are the same.
    """
    n = x.size
    if ys.ndim != 2 or ys.shape[1] != n:
        raise ValueError(f"ys must have shape (F, {n}), got {ys.shape}.")
    if x_increasing and n >= 3:
        fits = _theil_sen_increasing(x, ys)
        if fits is not None:
            return fits
    pairs = _PAIRS.get(n)
    if pairs is None:
        pairs = _PAIRS[n] = np.triu_indices(n, 1)
    i, j = pairs
    dx = x[j] - x[i]
    if x_increasing:
        xs, x_ties = x, 0.0
    else:
        xs = np.sort(x)
        keep = dx != 0
        if not keep.any():
            raise ValueError("x must not be all identical.")
        if not keep.all():
            # Each unordered pair once; its slope is the same in either order (scipy
            # keeps the ordering with dx > 0), and pairs with equal x give no slope.
            i, j, dx = i[keep], j[keep], dx[keep]
        x_ties = _tie_term(xs)
    # One buffer for the slopes (same operations as (ys[:, j] - ys[:, i]) / dx, fewer
    # temporaries of F x n(n-1)/2).
    slopes = ys.take(j, axis=1)
    slopes -= ys.take(i, axis=1)
    slopes /= dx
    nt = slopes.shape[1]
    yss = ys.copy()
    yss.sort(axis=1)
    base = n * (n - 1) * (2 * n + 5) - x_ties
    # Ranks of the interval's ends (Sen 1968, eq. 2.6); rows differ only by ties in y.
    if (yss[:, 1:] != yss[:, :-1]).all():
        sigsq = [base] * ys.shape[0]
    else:
        sigsq = (base - _tie_terms_rows(yss)).tolist()
    by_sq: dict[float, tuple[int, int] | None] = {}
    for b in sigsq:
        if b not in by_sq:
            by_sq[b] = _interval_ranks(nt, b)
    # Only a few order statistics are needed (the median and the interval's ends), but
    # numpy's partition at three or four ranks costs several times its vectorised sort
    # (measured: 87 us for two ranks, 33 us for the sort of 7 x 1,225 slopes).
    slopes.sort(axis=1)
    med = _sorted_median_rows(slopes)
    inter = (_sorted_median_rows(yss) - med * sorted_median(xs)).tolist()
    med = med.tolist()
    if len(by_sq) == 1:
        e = by_sq[sigsq[0]]
        if e is not None:
            lo_hi = slopes[:, list(e)].tolist()
            return [(med[r], inter[r], lo_hi[r][0], lo_hi[r][1]) for r in range(len(med))]
    out = []
    for r, b in enumerate(sigsq):
        e = by_sq[b]
        if e is None:
            out.append((med[r], inter[r], math.nan, math.nan))
        else:
            out.append((med[r], inter[r], float(slopes[r, e[0]]), float(slopes[r, e[1]])))
    return out


def _interval_ranks(nt: int, var18: float) -> tuple[int, int] | None:
    """Ranks (0-based, in the ascending slopes) of the 95 % interval's ends for ``nt``
    slopes and 18 times the variance of Kendall's S, ``var18`` (Sen 1968, eq. 2.6); None
    when that variance is not positive."""
    sq = var18 / 18.0
    if not sq > 0:
        return None
    zs = _Z_95 * math.sqrt(sq)
    return max(int(round((nt + zs) / 2.0)) - 1, 0), min(int(round((nt - zs) / 2.0)), nt - 1)


# Per window length n: pair indices, the interval's ranks for an increasing x and values
# without ties (then every row has the same ranks), the order statistics wanted and the
# median's among them.
_INCREASING: dict[int, tuple[np.ndarray, np.ndarray, tuple[int, int], np.ndarray, np.ndarray]] = {}


def _increasing_plan(n: int) -> tuple[np.ndarray, np.ndarray, tuple[int, int], np.ndarray, np.ndarray]:
    plan = _INCREASING.get(n)
    if plan is None:
        i, j = np.triu_indices(n, 1)
        nt = i.size
        ends = _interval_ranks(nt, n * (n - 1) * (2 * n + 5) - 0.0)
        assert ends is not None  # positive for n >= 3
        med = np.array(sorted({(nt - 1) // 2, nt // 2}), dtype=np.int64)
        ranks = np.array(sorted({*ends, *med.tolist()}), dtype=np.int64)
        plan = _INCREASING[n] = (i.astype(np.int64), j.astype(np.int64), ends, ranks, med)
    return plan


def _theil_sen_increasing(x: np.ndarray, ys: np.ndarray) -> list[tuple[float, float, float, float]] | None:
    """:func:`theil_sen_many` for a strictly increasing ``x`` (n >= 3), or None when a row
    of ``ys`` holds equal values (the general path handles their ties): the compiled
    kernel :func:`monitor.detection.kernels.theil_sen_rows`, the same numbers as the general path
    (tests/test_compiled.py)."""
    from monitor.detection.kernels import theil_sen_rows  # numba loads in ~0.5 s: on first use

    i, j, (lo, hi), ranks, med = _increasing_plan(x.size)
    out = theil_sen_rows(np.ascontiguousarray(x, dtype=float), np.ascontiguousarray(ys, dtype=float),
                         i, j, ranks, med, lo, hi)
    if out.shape[0] == 0:
        return None
    return [(m, c, a, b) for m, c, a, b in out.tolist()]


def _tie_terms_rows(sorted_rows: np.ndarray) -> np.ndarray:
    """:func:`_tie_term` of each row of ``sorted_rows`` (F, n), all rows at once.

    Same sum as :func:`_tie_term`, with the runs of every row found in one pass.
    """
    f, n = sorted_rows.shape
    same = np.zeros((f, n + 1), dtype=np.int8)
    np.equal(sorted_rows[:, 1:], sorted_rows[:, :-1], out=same[:, 1:n].view(bool))
    if not same.any():
        return np.zeros(f)
    # Runs of equal neighbours, row by row: a run of m equal pairs is a group of m + 1.
    rs, cs = np.nonzero(np.diff(same, axis=1))
    k = (cs[1::2] - cs[::2] + 1).astype(float)
    return np.bincount(rs[::2], weights=k * (k - 1) * (2 * k + 5), minlength=f)


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
    """Sliding window of (ts, value) for a Theil-Sen trend.

    ``size`` readings kept, ``min_readings`` before a trend is given. The fit is redone
    when ``refit_every`` readings have arrived since the last fit; in between, the last
    fit's line is carried forward to the latest reading (a 50-reading trend moves little
    in a few readings, and the fit is the costly part of detection).

    With ``speed_band`` (a fraction, e.g. 0.1) and speeds given to :meth:`add`, the window
    starts afresh when the running speed leaves ``speed_band`` of the speed at which the
    window started: a speed-dependent amplitude at another speed is a different operating
    point, not growth.
    """

    __slots__ = ("size", "min_readings", "refit_every", "speed_band", "ref_speed", "ts", "values",
                 "_fit", "_fit_ts", "_since_fit")

    def __init__(self, size: int = 50, min_readings: int = 10, refit_every: int = 1,
                 speed_band: float | None = None) -> None:
        if not isinstance(size, int) or size < 3:
            raise ValueError(f"size must be an integer >= 3 readings, got {size!r}.")
        if not isinstance(min_readings, int) or not 3 <= min_readings <= size:
            raise ValueError(f"min_readings must be an integer in [3, size], got {min_readings!r}.")
        if not isinstance(refit_every, int) or refit_every < 1:
            raise ValueError(f"refit_every must be an integer >= 1, got {refit_every!r}.")
        self.size = size
        self.min_readings = min_readings
        self.refit_every = refit_every
        self.speed_band = speed_band
        self.ref_speed: float | None = None
        self.ts: deque[float] = deque(maxlen=size)
        self.values: deque[float] = deque(maxlen=size)
        self._fit: Trend | None = None
        self._fit_ts = 0.0
        self._since_fit = 0

    def add(self, ts: float, value: float, speed_hz: float | None = None) -> bool:
        """Append one reading (seconds, feature unit; Hz for the speed band); a reading not
        later than the last one, or not finite, is left out. Returns :meth:`needs_fit`."""
        band = self.speed_band
        if band is not None and speed_hz is not None:
            ref = self.ref_speed
            if ref is None:
                self.ref_speed = float(speed_hz)
            elif abs(speed_hz - ref) > band * ref:
                self.clear()
                self.ref_speed = float(speed_hz)
        times = self.ts
        if (not times or ts > times[-1]) and math.isfinite(value) and math.isfinite(ts):
            times.append(float(ts))
            self.values.append(float(value))
            self._since_fit += 1
        return len(times) >= self.min_readings and (self._fit is None or self._since_fit >= self.refit_every)

    def clear(self) -> None:
        self.ts.clear()
        self.values.clear()
        self._fit = None
        self._since_fit = 0
        self.ref_speed = None

    def needs_fit(self) -> bool:
        return len(self.ts) >= self.min_readings and (self._fit is None or self._since_fit >= self.refit_every)

    def set_fit(self, trend: Trend) -> None:
        """Store a fit of the current window (from :meth:`trend` or a batch fit)."""
        self._fit = trend
        self._fit_ts = self.ts[-1]
        self._since_fit = 0

    def trend(self) -> Trend | None:
        """The trend at the latest reading (None with too few readings)."""
        if len(self.ts) < self.min_readings:
            return None
        if self.needs_fit():
            self.set_fit(theil_sen_trend(list(self.ts), list(self.values)))
        f = self._fit
        assert f is not None
        if self.ts[-1] == self._fit_ts:
            return f
        return Trend(f.slope_per_s, f.low_per_s, f.high_per_s,
                     f.fitted_now + f.slope_per_s * (self.ts[-1] - self._fit_ts), f.n)

    def snapshot(self) -> dict:
        """Exact JSON data (:mod:`monitor.detection.state_json`). ``ts`` and ``values`` are finite
        (:meth:`add` admits nothing else) and go as they are; the fit's interval ends are
        NaN when the window's values are all tied (zero variance of Kendall's S)."""
        f = self._fit
        return {"size": self.size, "min_readings": self.min_readings, "refit_every": self.refit_every,
                "speed_band": float_out(self.speed_band), "ref_speed": float_out(self.ref_speed),
                "ts": list(self.ts), "values": list(self.values),
                "fit": None if f is None else [*floats_out(f[:4]), f.n],
                "fit_ts": float_out(self._fit_ts), "since_fit": self._since_fit}

    @classmethod
    def restore(cls, data: dict) -> TrendWindow:
        """Rebuild from :meth:`snapshot`, the same window and fit to the bit."""
        w = cls(int(data["size"]), int(data["min_readings"]), int(data.get("refit_every", 1)),
                float_in(data.get("speed_band")))
        w.ref_speed = float_in(data.get("ref_speed"))
        w.ts.extend(floats_in(data.get("ts", [])))
        w.values.extend(floats_in(data.get("values", [])))
        f = data.get("fit")
        if f is not None:
            slope, low, high, fitted = floats_in(f[:4])
            w._fit = Trend(slope, low, high, fitted, int(f[4]))
        fit_ts = float_in(data.get("fit_ts"))
        w._fit_ts = 0.0 if fit_ts is None else fit_ts
        w._since_fit = int(data.get("since_fit", 0))
        return w


def fit_due_windows(windows: Sequence[TrendWindow]) -> None:
    """Refit every window of ``windows`` that is due (:meth:`TrendWindow.needs_fit`), one
    :func:`theil_sen_many` batch per distinct time axis (the features of one point share
    theirs); the same fits as each window's own :meth:`TrendWindow.trend`."""
    groups: list[tuple[TrendWindow, list[TrendWindow]]] = []
    for w in windows:
        if not w.needs_fit():
            continue
        ts = w.ts
        for first, ws in groups:
            # Same times (deques compare element by element); the ends are checked first.
            if first.ts[-1] == ts[-1] and first.ts[0] == ts[0] and first.ts == ts:
                ws.append(w)
                break
        else:
            groups.append((w, [w]))
    for first, ws in groups:
        t = np.fromiter(first.ts, float, len(first.ts))
        ys = np.fromiter(itertools.chain.from_iterable(w.values for w in ws), float,
                         len(ws) * t.size).reshape(len(ws), t.size)
        # Window times only ever increase (TrendWindow.add).
        fits = theil_sen_many(t - t[-1], ys, x_increasing=True)
        for w, (slope, inter, lo, hi) in zip(ws, fits, strict=True):
            w.set_fit(Trend(slope, lo, hi, inter, t.size))
