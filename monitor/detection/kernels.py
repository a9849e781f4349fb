"""Compiled loops for the hot spots of detection (numba; CPU only).

Each kernel does the same floating-point operations as the numpy code it stands in for
(IEEE subtraction and division, comparisons, order statistics, in the same order), so
its results are the same to the bit (one documented exception: the sign of a zero
maximum, see :func:`block_scan`): tests/test_compiled.py holds each to that numpy code and
to scipy. Compiled code is cached beside this module (``cache=True``), so a machine
compiles it once and later processes load it in milliseconds.

Why compiled: a Theil-Sen refit of a reading's features needs three order statistics of
each row of a (features x 1,225) slope array. numpy can only sort or partition the rows,
and on hosts without its SIMD sort that costs 120-200 us per refit, mostly in mispredicted
branches; the branch-free selection here takes about half of that. Sensor health needs a
block's finiteness, maximum, minimum and equal neighbours: three numpy passes (10-15 us
for 16,384 samples) against one vectorised pass here (3.5 us). Detection per reading went
from 0.22x to 0.17x of the analysis (bench/bench_detection.py).
"""

from __future__ import annotations

import numpy as np
from numba import njit

#: Partition passes of one selection before it sorts what is left of its range: the
#: guard of introselect against quickselect's quadratic worst case (many equal values).
_MAX_PASSES = 48


@njit(cache=True, nogil=True)
def _select(a, lo, hi, k):  # pragma: no cover - compiled
    """Put the k-th smallest value of a[lo..hi] (inclusive) at a[k], with no larger value
    before it and no smaller one after it, within lo..hi."""
    passes = 0
    while hi > lo:
        passes += 1
        if passes > _MAX_PASSES:
            a[lo : hi + 1] = np.sort(a[lo : hi + 1])
            return
        # Pivot: the median of the first, middle and last values, moved to a[hi].
        mid = (lo + hi) >> 1
        x, y, z = a[lo], a[mid], a[hi]
        if x > y:
            x, y = y, x
        if y > z:
            y = z
        if x > y:
            y = x
        if a[mid] == y:
            a[mid], a[hi] = a[hi], a[mid]
        elif a[lo] == y:
            a[lo], a[hi] = a[hi], a[lo]
        pivot = a[hi]
        # Lomuto's partition without a branch on the data: every value is swapped
        # into place and the boundary moves by the comparison's outcome.
        store = lo
        for i in range(lo, hi):
            t = a[i]
            a[i] = a[store]
            a[store] = t
            store += t < pivot
        a[hi] = a[store]
        a[store] = pivot
        if k == store:
            return
        if k < store:
            hi = store - 1
        else:
            lo = store + 1


@njit(cache=True, nogil=True)
def theil_sen_rows(x, ys, i, j, ranks, med_ranks, lo_rank, hi_rank):  # pragma: no cover - compiled
    """Theil-Sen fits of the rows of ``ys`` (F, n) against a strictly increasing ``x`` (n,).

    ``i`` and ``j`` are the pair indices (i < j) of all n (n - 1) / 2 slopes; ``ranks``
    the ascending, distinct order statistics wanted among the slopes: the median's one or
    two (``med_ranks``) and the 95 % interval's ends (``lo_rank``, ``hi_rank``).

    Returns (F, 4) rows of (slope, intercept, low slope, high slope), the intercept as
    median(y) - slope * median(x); or an empty (0, 4) array when a row holds equal values,
    whose ties change the interval's ranks (the caller's general path handles them).
    """
    f, n = ys.shape
    nt = i.size
    out = np.empty((f, 4))
    slopes = np.empty(nt)
    dx = np.empty(nt)
    for p in range(nt):
        dx[p] = x[j[p]] - x[i[p]]
    h = n // 2
    xmed = 0.5 * (x[h - 1] + x[h]) if n % 2 == 0 else x[h]
    for r in range(f):
        y = ys[r]
        ysorted = np.sort(y)
        for q in range(n - 1):
            if ysorted[q + 1] == ysorted[q]:
                return np.empty((0, 4))
        ymed = 0.5 * (ysorted[h - 1] + ysorted[h]) if n % 2 == 0 else ysorted[h]
        for p in range(nt):
            slopes[p] = (y[j[p]] - y[i[p]]) / dx[p]
        lo = 0
        for k in ranks:
            _select(slopes, lo, nt - 1, k)
            lo = k + 1  # nothing from lo on is smaller than slopes[k]
        if med_ranks.size == 2:
            med = 0.5 * (slopes[med_ranks[0]] + slopes[med_ranks[1]])
        else:
            med = slopes[med_ranks[0]]
        out[r, 0] = med
        out[r, 1] = ymed - med * xmed
        out[r, 2] = slopes[lo_rank]
        out[r, 3] = slopes[hi_rank]
    return out


_SIGN_OFF = np.int64(0x7FFFFFFFFFFFFFFF)


@njit(cache=True, nogil=True)
def _order_key(bits):  # pragma: no cover - compiled
    """The int64 whose order is that of the float64 with these ``bits`` (negative values
    have their magnitude bits flipped); its own inverse. NaNs land beyond the infinities."""
    return bits ^ ((bits >> 63) & _SIGN_OFF)


#: Order keys of -inf and +inf (:func:`_order_key` of their bits, worked out here in plain
#: Python): a block whose keys all lie strictly between them is finite.
_KEY_NEG_INF = int(np.array([-np.inf]).view(np.int64)[0]) ^ 0x7FFFFFFFFFFFFFFF
_KEY_POS_INF = int(np.array([np.inf]).view(np.int64)[0])


@njit(cache=True, nogil=True)
def block_scan(x):  # pragma: no cover - compiled
    """One pass over a block of samples ``x`` (1-D, contiguous float64, at least 1 value):
    ``(finite, maximum, minimum, equal_neighbours)``.

    ``finite`` is False when a sample is NaN or infinite (then maximum and minimum mean
    nothing). Maximum and minimum are found on the samples' order keys, integers that
    compare as the floats do (the loop then vectorises, which a float maximum with
    NaN's rules does not): the same values as numpy's maximum and minimum, except that +0
    counts as above -0. ``equal_neighbours`` counts k with x[k] == x[k - 1].
    """
    b = x.view(np.int64)
    kmax = _order_key(b[0])
    kmin = kmax
    same = 0
    for k in range(1, x.size):
        key = _order_key(b[k])
        kmax = max(kmax, key)
        kmin = min(kmin, key)
        same += x[k] == x[k - 1]
    finite = kmin > _KEY_NEG_INF and kmax < _KEY_POS_INF
    out = np.empty(2, dtype=np.int64)
    out[0] = _order_key(kmax)
    out[1] = _order_key(kmin)
    f = out.view(np.float64)
    return finite, f[0], f[1], same


@njit(cache=True, nogil=True)
def strided_order_stats(x, step, ranks):  # pragma: no cover - compiled
    """Values of the ascending, distinct ``ranks`` among x[::step] (as np.sort of that
    subset would place them), without sorting it."""
    sub = x[::step].copy()
    lo = 0
    for k in ranks:
        _select(sub, lo, sub.size - 1, k)
        lo = k + 1
    out = np.empty(ranks.size)
    for q in range(ranks.size):
        out[q] = sub[ranks[q]]
    return out


def warm_up() -> None:
    """Compile (or load from the cache) every kernel now, with a tiny input of the types
    detection passes (float64 arrays, int64 index arrays, Python ints): the first
    compilation takes several seconds, which a service should spend at its start rather
    than in the middle of a batch."""
    x = np.arange(4, dtype=float)
    i, j = (a.astype(np.int64) for a in np.triu_indices(x.size, 1))
    ranks = np.array([0, 2, 3, 5], dtype=np.int64)
    theil_sen_rows(x, np.array([[0.0, 1.0, 3.0, 2.0]]), i, j, ranks, np.array([2, 3], dtype=np.int64), 0, 5)
    block_scan(x)
    strided_order_stats(x, 1, np.array([0, 2], dtype=np.int64))
