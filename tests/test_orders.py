"""Order amplitudes and phases against closed-form signals."""

import math

import numpy as np
import pytest
from scipy import constants

from monitor.analysis.orders import normalise_orders, order_amplitudes

FS = 4096.0
N = 16384


def test_amplitudes_at_orders():
    # known answer: 1x, 2x and 7x of exact amplitudes at a speed between bins
    speed = 23.456
    t = np.arange(N) / FS
    x = 0.4 * np.cos(2 * np.pi * speed * t) + 0.1 * np.sin(4 * np.pi * speed * t)
    x += 1.5 * np.cos(2 * np.pi * 7 * speed * t + 1.0)
    out = order_amplitudes(x.astype(np.float32), FS, "g", speed, [7, 1, 2, 2.0])
    assert [o.order for o in out] == [1.0, 2.0, 7.0]
    for o, a in zip(out, (0.4, 0.1, 1.5), strict=True):
        # analytic: the input amplitudes of the synthesised components; tolerance: 1e-4,
        # engineering choice for a noise-free float32 record
        assert o.amplitude == pytest.approx(a, rel=1e-4)
        # definition of an order: order x shaft speed
        assert o.frequency_hz == pytest.approx(o.order * speed)
        # V = A / (2 pi f) with A in m/s^2 (g = 9.80665 m/s^2, CGPM 1901)
        assert o.velocity_mm_s == pytest.approx(
            a * constants.g / (2 * math.pi * o.frequency_hz) * 1e3, rel=1e-4
        )
        assert o.phase_deg is None


@pytest.mark.parametrize("phi_deg", [0.0, 37.0, 90.0, 181.5, 300.0])
def test_phase_against_reference_pulse(phi_deg):
    # x = A cos(Omega (t - t_ref) - phi): phase phi is the lag of the positive peak after
    # the once-per-revolution pulse (common practice for balancing)
    speed = 19.87
    t_ref = 0.0371
    t = np.arange(N) / FS
    phi = math.radians(phi_deg)
    x = 2.0 * np.cos(2 * np.pi * speed * (t - t_ref) - phi)
    x += 0.5 * np.cos(2 * 2 * np.pi * speed * (t - t_ref) - 2 * phi)
    (one, two) = order_amplitudes(x, FS, "mm/s", speed, [1, 2], reference_s=t_ref)
    # analytic: the lags phi (1x) and 2 phi (2x) built into the synthesised cosines, and the
    # 1x input amplitude 2.0 (unit mm/s, so velocity is the amplitude itself); tolerance:
    # 0.05 deg, engineering choice for a noise-free record
    assert (one.phase_deg - phi_deg + 180) % 360 - 180 == pytest.approx(0.0, abs=0.05)
    assert (two.phase_deg - (2 * phi_deg) % 360 + 180) % 360 - 180 == pytest.approx(0.0, abs=0.05)
    assert one.velocity_mm_s == pytest.approx(2.0, rel=1e-4)


def test_phase_independent_of_which_pulse():
    speed = 25.0
    t = np.arange(N) / FS
    x = np.cos(2 * np.pi * speed * (t - 0.01) - 1.0)
    p1 = order_amplitudes(x, FS, "g", speed, [1], reference_s=0.01)[0].phase_deg
    p2 = order_amplitudes(x, FS, "g", speed, [1], reference_s=0.01 + 7 / speed)[0].phase_deg
    # analytic: pulses a whole number of revolutions apart give the same phase
    assert p1 == pytest.approx(p2, abs=1e-6)


def test_orders_above_nyquist_left_out():
    x = np.random.default_rng(0).standard_normal(N)
    out = order_amplitudes(x, FS, "g", 500.0, [1, 2, 5])
    assert [o.order for o in out] == [1.0, 2.0]


def test_bad_input():
    x = np.ones(N)
    with pytest.raises(ValueError, match="speed_hz"):
        order_amplitudes(x, FS, "g", 0.0, [1])
    with pytest.raises(ValueError, match="orders"):
        normalise_orders([1, -2])
    with pytest.raises(ValueError, match="reference_s"):
        order_amplitudes(x, FS, "g", 10.0, [1], reference_s=float("nan"))
    with pytest.raises(ValueError, match="unit 'inch'"):
        order_amplitudes(x, FS, "inch", 10.0, [1])
