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


# ----------------------------------------------------------------------------- pulse train


def _noisy_tone(rng, speed, t_first, phi_deg, snr_db, n, order=1.0, amp=1.0):
    """A cos(k Omega (t - t1) - phi) plus white noise at ``snr_db`` (signal power A^2 / 2
    over noise variance, the usual definition for a sinusoid in white noise)."""
    t = np.arange(n) / FS
    x = amp * np.cos(2 * np.pi * order * speed * (t - t_first) - math.radians(phi_deg))
    sigma = math.sqrt(amp**2 / 2 / 10 ** (snr_db / 10))
    return x + rng.normal(0.0, sigma, n)


@pytest.mark.parametrize("phi_deg", [0.0, 37.0, 90.0, 181.5, 300.0])
def test_phase_from_pulse_train_at_30_db(phi_deg):
    # Closed form: x = A cos(Omega (t - t1) - phi) lags the pulse at t1 by phi (definition
    # of the phase of a sinusoid; the DTFT of A cos(w t - theta) at w is (A/2) e^{-j theta},
    # Oppenheim and Schafer, from memory). Pulses once per revolution from t1, 20 us
    # jitter (an optical sensor's trigger, engineering choice). 1024 samples = 6 revolutions.
    rng = np.random.default_rng(int(phi_deg * 10))
    speed, t1, n = 23.7, 0.0137, 1024
    worst = 0.0
    for _ in range(20):
        x = _noisy_tone(rng, speed, t1, phi_deg, 30.0, n)
        pulses = t1 + np.arange(int((n / FS - t1) * speed) + 1) / speed
        pulses += rng.normal(0.0, 20e-6, pulses.size)
        (one,) = order_amplitudes(x, FS, "g", None, [1], once_per_rev_s=pulses)
        # issue 13: within 2 degrees at an SNR of 30 dB
        worst = max(worst, abs((one.phase_deg - phi_deg + 180) % 360 - 180))
        # the speed is the pulse train's: 1 / interval (definition of once per revolution)
        assert one.frequency_hz == pytest.approx(speed, rel=1e-3)
    assert worst < 2.0


def test_pulse_train_speed_replaces_a_wrong_speed():
    # A separately measured speed 1 % off would smear the phase across the block; with
    # the pulse train the order is read at the train's speed (definition of 1x).
    speed, t1 = 19.87, 0.021
    t = np.arange(N) / FS
    x = 2.0 * np.cos(2 * np.pi * speed * (t - t1) - math.radians(135.0))
    x += 0.5 * np.cos(2 * 2 * np.pi * speed * (t - t1) - math.radians(40.0))
    pulses = t1 + np.arange(int((N / FS - t1) * speed) + 1) / speed
    one, two = order_amplitudes(x, FS, "mm/s", 1.01 * speed, [1, 2], once_per_rev_s=pulses)
    # analytic: the lags and amplitudes built into the cosines; 0.05 deg / 1e-4 for a
    # noise-free record (engineering choice, as above)
    assert one.phase_deg == pytest.approx(135.0, abs=0.05)
    assert two.phase_deg == pytest.approx(40.0, abs=0.05)
    assert one.amplitude == pytest.approx(2.0, rel=1e-4)
    assert one.frequency_hz == pytest.approx(speed, rel=1e-9)


def test_half_order_phase_is_against_the_first_pulse():
    # A half order repeats every two revolutions, so its phase depends on which pulse is
    # the reference: the first one (docs/mqtt.md). x = cos(0.5 Omega (t - t1) - phi).
    speed, t1 = 20.0, 0.03
    t = np.arange(N) / FS
    x = np.cos(0.5 * 2 * np.pi * speed * (t - t1) - math.radians(70.0))
    pulses = t1 + np.arange(int((N / FS - t1) * speed) + 1) / speed
    (half,) = order_amplitudes(x, FS, "g", None, [0.5], once_per_rev_s=pulses)
    assert half.phase_deg == pytest.approx(70.0, abs=0.05)  # analytic, as above


def test_phase_against_scipy_fft_reference():
    # Reference: scipy.fft.rfft of a block holding a whole number of cycles puts the tone
    # in one bin, whose angle is -theta for A cos(w t - theta); phi = theta - w t1.
    from scipy import fft

    rng = np.random.default_rng(11)
    n, bins = 4096, 25  # 25 cycles in the block: speed = 25 FS / n = 25.0 Hz
    speed, t1 = bins * FS / n, 0.0071
    x = _noisy_tone(rng, speed, t1, 212.0, 30.0, n)
    theta = -np.angle(fft.rfft(x)[bins])
    reference = math.degrees(theta - 2 * np.pi * speed * t1) % 360
    pulses = t1 + np.arange(int((n / FS - t1) * speed) + 1) / speed
    (one,) = order_amplitudes(x, FS, "g", None, [1], once_per_rev_s=pulses)
    assert abs((one.phase_deg - reference + 180) % 360 - 180) < 2.0  # issue 13 target


def test_single_pulse_and_empty_train():
    speed, t1 = 25.0, 0.01
    t = np.arange(N) / FS
    x = np.cos(2 * np.pi * speed * (t - t1) - 1.0)
    # one pulse: the given speed, phase against that pulse (as reference_s)
    (one,) = order_amplitudes(x, FS, "g", speed, [1], once_per_rev_s=[t1])
    assert one.phase_deg == pytest.approx(math.degrees(1.0), abs=0.05)  # analytic
    # a repeated time is one pulse
    (rep,) = order_amplitudes(x, FS, "g", speed, [1], once_per_rev_s=[t1, t1])
    assert rep.phase_deg == pytest.approx(one.phase_deg, abs=1e-9)
    # no pulse in the block: no phase
    (none,) = order_amplitudes(x, FS, "g", speed, [1], once_per_rev_s=[])
    assert none.phase_deg is None


def test_pulse_train_errors():
    x = np.ones(N)
    with pytest.raises(ValueError, match="not both"):
        order_amplitudes(x, FS, "g", 10.0, [1], reference_s=0.0, once_per_rev_s=[0.0, 0.1])
    with pytest.raises(ValueError, match="speed_hz is required"):
        order_amplitudes(x, FS, "g", None, [1], once_per_rev_s=[0.1])
    with pytest.raises(ValueError, match="non-decreasing"):
        order_amplitudes(x, FS, "g", None, [1], once_per_rev_s=[0.2, 0.1])


@pytest.mark.parametrize("rate_hz_s", [0.5, 5.0])
def test_phase_during_a_run_up_within_the_block(rate_hz_s):
    # Closed form: speed s0 + a t, shaft angle 2 pi (s0 t + a t^2 / 2) (uniform angular
    # acceleration, kinematics); x = A cos(angle - phi); pulses where the angle is 2 pi k.
    # A fixed-frequency DTFT would lag by several degrees at 0.5 Hz/s in a 1 s block.
    n, s0, phi = 4096, 19.75, 60.0
    t = np.arange(n) / FS
    x = 0.8 * np.cos(2 * np.pi * (s0 * t + rate_hz_s * t**2 / 2) - math.radians(phi))
    k = np.arange(40)
    pulses = (-s0 + np.sqrt(s0**2 + 2 * rate_hz_s * k)) / rate_hz_s
    (one,) = order_amplitudes(x, FS, "g", None, [1], once_per_rev_s=pulses[pulses < n / FS])
    # analytic: the lag and amplitude built into the chirp; 0.05 deg / 1e-4 for a
    # noise-free record (engineering choice)
    assert one.phase_deg == pytest.approx(phi, abs=0.05)
    assert one.amplitude == pytest.approx(0.8, rel=1e-4)
    # the mean speed over the pulses: s0 + a t_mid (kinematics), to 1 %
    assert one.frequency_hz == pytest.approx(s0 + rate_hz_s * 0.5, rel=0.01)
