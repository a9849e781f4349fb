"""Robust baseline (median/MAD), Theil-Sen trend and projected time to a limit."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from monitor.detection.growth import (
    MAD_TO_SIGMA,
    Baseline,
    TrendWindow,
    theil_sen,
    theil_sen_many,
    theil_sen_trend,
    time_to_limit,
)


class TestTheilSen:
    @pytest.mark.parametrize("seed", [0, 1, 2, 3])
    def test_against_scipy(self, seed):
        # Reference library: scipy.stats.theilslopes (same estimator, 95 % interval).
        rng = np.random.default_rng(seed)
        x = np.sort(rng.uniform(0, 100, 40))
        y = 0.3 * x + rng.standard_normal(40) + np.where(rng.random(40) < 0.1, 20.0, 0.0)
        ref = stats.theilslopes(y, x)
        slope, inter, lo, hi = theil_sen(x, y)
        assert slope == pytest.approx(ref.slope, rel=1e-12)
        assert inter == pytest.approx(ref.intercept, rel=1e-12, abs=1e-12)
        assert lo == pytest.approx(ref.low_slope, rel=1e-12)
        assert hi == pytest.approx(ref.high_slope, rel=1e-12)

    def test_ties_against_scipy(self):
        # Sen (1968) eq. 2.6 tie correction, as in scipy.stats.theilslopes.
        x = np.array([0, 1, 1, 2, 3, 3, 3, 4, 5, 6], dtype=float)
        y = np.array([1, 2, 2, 2, 4, 5, 5, 6, 6, 8], dtype=float)
        ref = stats.theilslopes(y, x)
        got = theil_sen(x, y)
        assert got == pytest.approx((ref.slope, ref.intercept, ref.low_slope, ref.high_slope))

    def test_many_rows_on_a_time_axis_against_scipy(self):
        # The batch fit used by detection (strictly increasing times, rows with and without
        # ties in y) gives scipy.stats.theilslopes' numbers for every row.
        rng = np.random.default_rng(7)
        x = np.cumsum(rng.uniform(0.5, 2.0, 30))
        ys = np.stack([
            0.2 * x + rng.standard_normal(30),
            np.round(0.2 * x + rng.standard_normal(30)),  # quantised: many ties
            -0.1 * x + rng.standard_normal(30),
        ])
        for row, got in zip(ys, theil_sen_many(x, ys, x_increasing=True), strict=True):
            ref = stats.theilslopes(row, x)
            assert got == pytest.approx((ref.slope, ref.intercept, ref.low_slope, ref.high_slope),
                                        rel=1e-12, abs=1e-12)
        # Rows without ties take their own path (no tie terms); odd and even lengths.
        for n in (29, 30):
            rows = ys[[0, 2], :n]
            for row, got in zip(rows, theil_sen_many(x[:n], rows, x_increasing=True), strict=True):
                ref = stats.theilslopes(row, x[:n])
                assert got == pytest.approx((ref.slope, ref.intercept, ref.low_slope, ref.high_slope),
                                            rel=1e-12, abs=1e-12)
                assert got == theil_sen_many(x[:n], row[None, :])[0]  # same as the general path

    def test_trend_intercept_is_value_now(self):
        t = np.arange(20.0) * 3600.0 + 1.7e9
        v = 2.0 + 1e-5 * (t - t[0])
        tr = theil_sen_trend(t, v)
        # analytic: the exact line built above; 1e-5 /s x 86400 s/day = 0.864 /day
        assert tr.slope_per_s == pytest.approx(1e-5)
        assert tr.fitted_now == pytest.approx(v[-1])
        assert tr.slope_per_day == pytest.approx(0.864)
        assert tr.rising

    def test_bad(self):
        with pytest.raises(ValueError, match="length"):
            theil_sen_trend([1.0, 2.0], [1.0, 2.0])
        with pytest.raises(ValueError, match="ts must span"):
            theil_sen_trend([1.0, 1.0, 1.0], [1.0, 2.0, 3.0])


class TestTimeToLimit:
    @pytest.mark.parametrize("seed", range(5))
    def test_linear_growth_with_noise_within_20_percent(self, seed):
        # Truth from the simulated line itself (physical model: constant growth rate).
        rng = np.random.default_rng(seed)
        day = 86400.0
        t = np.arange(50) * 6 * 3600.0  # every 6 h for 12.25 days
        rate = 0.15 / day  # mm/s RMS per second
        v = 2.0 + rate * t + 0.05 * rng.standard_normal(t.size)
        limit = 4.5
        truth = (limit - (2.0 + rate * t[-1])) / rate
        ttl = time_to_limit(theil_sen_trend(t, v), limit)
        assert ttl is not None
        # tolerance: 20 %, engineering choice; the noise (0.05 mm/s over 12 days of readings)
        # moves the Theil-Sen slope by a few percent, so 20 % leaves a wide margin
        assert abs(ttl - truth) <= 0.2 * truth

    def test_flat_gives_none(self):
        rng = np.random.default_rng(7)
        t = np.arange(40) * 3600.0
        v = 2.0 + 0.05 * rng.standard_normal(40)
        assert time_to_limit(theil_sen_trend(t, v), 4.5) is None

    def test_already_over(self):
        t = np.arange(10.0)
        # definition: a value already above the limit has no time left
        assert time_to_limit(theil_sen_trend(t, 5.0 + 0.0 * t), 4.5) == 0.0


class TestBaseline:
    def test_median_mad_ignore_outliers(self):
        # Hampel (1974): median and MAD; 1.4826 MAD estimates sigma for normal data.
        rng = np.random.default_rng(3)
        vals = 2.0 + 0.1 * rng.standard_normal(200)
        vals[:10] = 50.0  # 5 % wild readings
        b = Baseline(size=200)
        for v in vals:
            b.add(v, 10.0)
        assert b.ready
        # reference: numpy.median of all 200 values, wild ones included
        assert b.stats.median == pytest.approx(np.median(vals))
        # analytic: 0.1 is the sigma of the generated normal values. tolerance: 20 %; the
        # MAD estimate of sigma from ~200 normal values scatters by about 8 % (efficiency
        # 37 % of the standard deviation, Hampel 1974, from memory) and the 5 % one-sided
        # wild readings inflate it a few percent more
        assert b.stats.sigma == pytest.approx(0.1, rel=0.2)
        # consistency constant of the MAD for a normal distribution: 1 / Phi^-1(3/4)
        # (Hampel 1974; scipy.stats.norm as the reference)
        assert pytest.approx(1.0 / stats.norm.ppf(0.75), rel=1e-6) == MAD_TO_SIGMA
        assert b.stats.sigma == pytest.approx(b.stats.mad / stats.norm.ppf(0.75), rel=1e-6)
        assert b.ratio(4.0) == pytest.approx(4.0 / b.stats.median)  # definition of the ratio
        assert b.speed_hz == 10.0

    def test_frozen_after_learning_and_restartable(self):
        b = Baseline(size=3)
        for v in (1.0, 2.0, 3.0):
            b.add(v)
        assert b.stats.median == 2.0  # definition: median of 1, 2, 3
        b.add(100.0)
        assert b.stats.median == 2.0 and b.stats.count == 3
        b.restart(ts=5.0)
        assert not b.ready and b.ratio(1.0) is None
        for v in (4.0, 4.0, 4.0):
            b.add(v)
        assert b.stats.median == 4.0 and b.started_at == 5.0

    def test_snapshot_round_trip(self):
        b = Baseline(size=4)
        for v in (1.0, 2.0, 3.0):
            b.add(v, 10.0)
        b2 = Baseline.restore(b.snapshot())
        assert not b2.ready
        b.add(4.0, 10.0)
        b2.add(4.0, 10.0)
        assert b2.stats == b.stats

    def test_bad_size(self):
        with pytest.raises(ValueError, match="size"):
            Baseline(size=1)


def test_trend_window_slides_and_restores():
    w = TrendWindow(size=5, min_readings=3)
    assert w.trend() is None
    for i in range(10):
        w.add(float(i), 2.0 * i)
    assert list(w.ts) == [5.0, 6.0, 7.0, 8.0, 9.0]  # the last 5 of 10 readings
    assert w.trend().slope_per_s == pytest.approx(2.0)  # analytic: the line v = 2 t
    w.add(3.0, 0.0)  # out-of-order time is ignored
    assert len(w.ts) == 5 and w.ts[-1] == 9.0
    w2 = TrendWindow.restore(w.snapshot())
    assert list(w2.values) == list(w.values)
