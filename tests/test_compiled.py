"""The compiled kernels (monitor/detection/kernels.py) against numpy and scipy.

Selections must leave at each wanted rank the value a full sort puts there, so Theil-Sen
fits are the general numpy path's (monitor.detection.growth.theil_sen_many) to the bit and scipy.stats.theilslopes' (the reference library)
to rounding; the block scan must find what numpy's maximum, minimum and comparisons find.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from monitor.detection.growth import (
    _increasing_plan,
    _theil_sen_increasing,
    sorted_median,
    theil_sen_many,
)
from monitor.detection.health import _mad_lower_bound, _subset_median_and_bound
from monitor.detection.kernels import block_scan, theil_sen_rows


def _time_axis(rng: np.random.Generator, n: int) -> np.ndarray:
    x = np.cumsum(rng.uniform(1.0, 900.0, n))
    return x - x[-1]  # relative to the latest reading, as detection fits it


@pytest.mark.parametrize("n", [3, 4, 5, 17, 50, 51, 120])
def test_same_bits_as_numpy_and_scipy_to_rounding(n):
    rng = np.random.default_rng(n)
    for _ in range(20):
        x = _time_axis(rng, n)
        ys = np.stack([
            1e-4 * x + rng.standard_normal(n),                 # noisy growth
            rng.standard_normal(n).cumsum() * 3.0,             # random walk
            np.exp(1e-6 * (x - x[0])) + 1e-3 * rng.standard_normal(n),  # gentle curve
            np.where(rng.random(n) < 0.2, 50.0, 0.0) + rng.standard_normal(n),  # outliers
        ])
        got = _theil_sen_increasing(x, ys)
        assert got == theil_sen_many(x, ys)  # the general numpy path, to the bit
        for row, fit in zip(ys, got, strict=True):
            ref = stats.theilslopes(row, x)  # reference library
            assert fit == pytest.approx((ref.slope, ref.intercept, ref.low_slope, ref.high_slope),
                                        rel=1e-12, abs=1e-12)


def test_order_statistics_are_those_of_a_full_sort():
    # Whatever the values (sorted, reversed, many equal slopes from an exactly linear
    # row, which drives the selection into its sorting guard), each wanted rank holds
    # the value np.sort puts there.
    n = 50
    i, j, (lo, hi), ranks, med = _increasing_plan(n)
    x = np.arange(n, dtype=float) * 60.0 - (n - 1) * 60.0
    rows = np.stack([
        2.0 + 0.5 * x,                          # every slope equal
        np.arange(n, dtype=float) ** 2,         # slopes increase with the pair
        -(np.arange(n, dtype=float) ** 3),      # and decrease
        np.round(np.sin(np.arange(n) * 0.7), 1) + np.arange(n) * 1e-3,  # few distinct slopes
    ])
    out = theil_sen_rows(x, rows, i, j, ranks, med, lo, hi)
    for row, fit in zip(rows, out, strict=True):
        s = np.sort((row[j] - row[i]) / (x[j] - x[i]))
        assert fit[0] == s[med].mean() and fit[2] == s[lo] and fit[3] == s[hi]


def test_a_row_with_equal_values_goes_back_to_the_general_path():
    # Ties in y change the interval's ranks (Sen 1968, eq. 2.6): the kernel declines.
    x = np.arange(6, dtype=float)
    ys = np.array([[1.0, 2.0, 3.0, 4.0, 5.0, 6.0], [1.0, 2.0, 2.0, 3.0, 4.0, 5.0]])
    assert _theil_sen_increasing(x, ys) is None
    assert theil_sen_many(x, ys, x_increasing=True) == theil_sen_many(x, ys)  # which fits them


def _numpy_scan(x: np.ndarray) -> tuple[bool, float, float, int]:
    return (bool(np.isfinite(x).all()), float(np.maximum.reduce(x)), float(np.minimum.reduce(x)),
            int(np.count_nonzero(x[1:] == x[:-1])))


def test_block_scan_agrees_with_numpy():
    # Maximum, minimum and equal neighbours as numpy finds them; any NaN (either sign) or
    # infinity anywhere, first or last included, reported as not finite.
    rng = np.random.default_rng(11)
    t = np.arange(16384) / 25600.0
    blocks = [
        1.5 * np.sin(2 * np.pi * 24.6 * t) + 0.2 * rng.standard_normal(t.size),
        np.round(rng.standard_normal(4096), 1),                     # many equal neighbours
        np.clip(3.0 * np.sin(2 * np.pi * 50 * t[:5000]), -2.0, 2.0),  # clipped rails
        -np.abs(rng.standard_normal(777)) - 1e300,                   # all negative, huge
        np.full(64, 7.25),
        np.array([5e-324, -5e-324, 1e-310, -1e308, 1.7e308]),       # subnormals, extremes
    ]
    for x in blocks:
        assert block_scan(x) == _numpy_scan(x)
    for bad in (np.nan, -np.nan, np.inf, -np.inf):
        for at in (0, 5, 4095):
            x = blocks[1].copy()
            x[at] = bad
            assert block_scan(x)[0] is False
    # Signed zeros compare equal, as in numpy; +0 is taken as the larger.
    assert block_scan(np.array([0.0, -0.0, -0.0, 1.0])) == (True, 1.0, -0.0, 2)
    ptp_all_zero = block_scan(np.array([-0.0, 0.0, -0.0]))
    assert ptp_all_zero[1] - ptp_all_zero[2] == 0.0


@pytest.mark.parametrize("size,step", [(16384, 32), (16383, 31), (1000, 1), (8, 1), (9, 2)])
def test_subset_median_and_bound_are_those_of_the_sorted_subset(size, step):
    rng = np.random.default_rng(size)
    for x in (rng.standard_normal(size), np.round(rng.standard_normal(size)), np.arange(size, 0, -1.0)):
        s = np.sort(x[::step])
        med = sorted_median(s)
        assert _subset_median_and_bound(x, step) == (med, _mad_lower_bound(s, s.size, med))
        assert med == np.median(x[::step])  # reference library
