"""Running speed: estimation against the Cramer-Rao bound, harmonic confusion, tach pulses."""

import math

import numpy as np
import pytest

from monitor.analysis import spectrum as sp
from monitor.analysis.record import Record, record_spectrum
from monitor.analysis.speed import crlb_frequency_var, estimate_speed, speed_from_tach

FS = 2048.0
N = 8192
RANGE = (5.0, 50.0)  # contains 0.5x and 2x of every speed used below


def machine_signal(rng, f0, eta_1x, harmonics=(1.0, 0.5, 0.25)):
    """1x of amplitude 1 plus harmonics with random phases, in white Gaussian noise.

    SNR definition (per sample, of the 1x component alone, as in the bound):
    eta = A_1^2 / (2 sigma^2), sigma^2 the noise variance per sample.
    """
    t = np.arange(N) / FS
    x = sum(
        a * np.cos(2 * np.pi * (h + 1) * f0 * t + rng.uniform(0, 2 * np.pi))
        for h, a in enumerate(harmonics)
    )
    sigma = math.sqrt(1.0 / (2.0 * eta_1x))
    return x + sigma * rng.standard_normal(N)


def test_crlb_formula():
    # Kay 1993, Estimation Theory, sect. 3.7 (from memory):
    # var(f) >= 12 / ((2 pi)^2 eta N (N^2 - 1)) cycles/sample^2; here converted to Hz^2
    eta, n = 10.0, 1000
    expected = 12.0 / ((2 * math.pi) ** 2 * eta * n * (n * n - 1)) * FS**2
    assert crlb_frequency_var(eta, n, FS) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize(
    "eta_db,harmonics",
    [(0.0, (1.0,)), (10.0, (1.0,)), (10.0, (1.0, 0.5, 0.25)), (20.0, (1.0, 0.5, 0.25))],
)
def test_rms_error_within_twice_crlb(eta_db, harmonics):
    # Issue 2 target: RMS error at most 2x the Cramer-Rao lower bound of the 1x sinusoid's
    # frequency (Kay 1993 sect. 3.7, from memory) at the same SNR and record length, over
    # 200 seeded trials. Checked in the stricter sense MSE <= 2 x CRLB (so RMS error
    # <= 1.41 x the bound's standard deviation). Speeds off-bin, uniform in 12-24 Hz.
    rng = np.random.default_rng(20260 + int(eta_db))
    eta = 10 ** (eta_db / 10)
    errs = []
    for _ in range(200):
        f0 = rng.uniform(12.0, 24.0)
        x = machine_signal(rng, f0, eta, harmonics)
        rec = Record.of(x, FS)
        est = estimate_speed(record_spectrum(rec, "m/s^2"), RANGE, samples=rec)
        errs.append(est.speed_hz - f0)
    mse = float(np.mean(np.square(errs)))
    assert mse <= 2.0 * crlb_frequency_var(eta, N, FS)


def test_stated_uncertainty_matches_observed_spread():
    # the stated one-sigma uncertainty is the bound for the harmonics used; the estimator
    # being efficient, the observed RMS error must sit within 25 % of it
    rng = np.random.default_rng(7)
    errs, uncs = [], []
    for _ in range(200):
        f0 = rng.uniform(12.0, 24.0)
        x = machine_signal(rng, f0, 10.0, (1.0, 0.5))
        est = estimate_speed(sp.amplitude_spectrum(x, FS, "g"), RANGE, samples=x, fs_hz=FS)
        errs.append(est.speed_hz - f0)
        uncs.append(est.uncertainty_hz)
    ratio = math.sqrt(np.mean(np.square(errs))) / math.sqrt(np.mean(np.square(uncs)))
    # expected 1: an efficient estimator attains the Cramer-Rao bound (Kay 1993 sect. 3.7,
    # from memory). tolerance: the RMS of 200 normal errors scatters by about
    # 1/sqrt(2 x 200) = 5 % (chi-square, textbook statistics), so +-25 % is about 5 sigma
    assert 0.75 < ratio < 1.25


def test_spectrum_only_path_is_close_and_honest():
    # without samples: Hann interpolation; error within the stated uncertainty's scale
    rng = np.random.default_rng(8)
    errs, uncs = [], []
    for _ in range(200):
        f0 = rng.uniform(12.0, 24.0)
        x = machine_signal(rng, f0, 10.0)
        est = estimate_speed(sp.amplitude_spectrum(x, FS, "g"), RANGE)
        errs.append(est.speed_hz - f0)
        uncs.append(est.uncertainty_hz)
    rms = math.sqrt(np.mean(np.square(errs)))
    assert rms < 0.01 * FS / N  # a hundredth of a bin (issue 2 frequency target)
    # expected 1: the stated uncertainty should describe the observed spread. tolerance:
    # wider than the +-25 % above because this path states 2.2 x the Cramer-Rao deviation,
    # a loss factor measured on our own estimator (monitor/analysis/speed.py _SPECTRAL_PATH_LOSS),
    # not a published value; engineering choice
    assert 0.6 < rms / math.sqrt(np.mean(np.square(uncs))) < 1.6


@pytest.mark.parametrize("eta_db", [10.0, 13.0])
def test_no_harmonic_confusion(eta_db):
    # at SNR >= 10 dB the estimate is never 2x or 0.5x of the true speed (issue 2), even
    # with a 2x component half the 1x and both 0.5x and 2x inside the speed range
    rng = np.random.default_rng(99)
    eta = 10 ** (eta_db / 10)
    for _ in range(200):
        f0 = rng.uniform(12.0, 24.0)
        x = machine_signal(rng, f0, eta, (1.0, 0.5, 0.3, 0.2))
        est = estimate_speed(sp.amplitude_spectrum(x, FS, "g"), RANGE)
        # analytic: the synthesised 1x frequency; 1 % tolerance is far from the 2x / 0.5x
        # confusions (100 % / 50 % off) this test is about
        assert abs(est.speed_hz / f0 - 1.0) < 0.01


def test_welch_spectrum_with_samples():
    # a Welch-averaged spectrum still gives the fine estimate from the samples
    rng = np.random.default_rng(3)
    x = machine_signal(rng, 17.123, 10.0)
    est = estimate_speed(
        sp.amplitude_spectrum(x, FS, "g", segment_length=2048), RANGE, samples=x, fs_hz=FS
    )
    # analytic: the synthesised 1x frequency; tolerance: 5 x the stated one-sigma
    # uncertainty (engineering choice)
    assert est.speed_hz == pytest.approx(17.123, abs=5 * est.uncertainty_hz)
    assert est.source == "estimated"
    assert 1 in est.harmonics


class TestBadInput:
    def setup_method(self):
        self.spec = sp.amplitude_spectrum(np.random.default_rng(0).standard_normal(1024), FS, "g")

    def test_range_excluding_every_bin(self):
        with pytest.raises(ValueError, match="speed_range_hz .* excludes every bin"):
            estimate_speed(self.spec, (5000.0, 6000.0))
        with pytest.raises(ValueError, match="speed_range_hz .* excludes every bin"):
            estimate_speed(self.spec, (0.0, 0.5))

    def test_malformed_range(self):
        with pytest.raises(ValueError, match="speed_range_hz"):
            estimate_speed(self.spec, (50.0, 5.0))
        with pytest.raises(ValueError, match="speed_range_hz"):
            estimate_speed(self.spec, (float("nan"), 5.0))
        with pytest.raises(ValueError, match="speed_range_hz"):
            estimate_speed(self.spec, 5.0)

    def test_samples_without_rate(self):
        with pytest.raises(ValueError, match="fs_hz is required"):
            estimate_speed(self.spec, RANGE, samples=np.ones(1024))


class TestTach:
    def test_speed_and_missing_pulse(self):
        # pulse every 1/24.7 s with 20 us jitter; one pulse lost
        rng = np.random.default_rng(1)
        t = np.arange(100) / 24.7 + rng.normal(0, 20e-6, 100)
        t = np.delete(t, 40)
        tach = speed_from_tach(t)
        # definition: pulses once per revolution at 24.7 rev/s; tolerance: 3 x the stated
        # standard error (engineering choice); the lost pulse is counted (one of 100 removed)
        assert tach.speed_hz == pytest.approx(24.7, abs=3 * tach.uncertainty_hz)
        assert tach.uncertainty_hz > 0
        assert tach.missing == 1
        assert tach.pulses == 99

    def test_exact_pulses(self):
        t = 0.013 + np.arange(10) / 30.0
        tach = speed_from_tach(t)
        # definition: pulses exactly 1/30 s apart are 30 rev/s
        assert tach.speed_hz == pytest.approx(30.0, rel=1e-12)
        # the reference is a pulse instant
        assert ((tach.reference_s - 0.013) * 30.0) % 1.0 == pytest.approx(0.0, abs=1e-9)

    def test_speed_drifting_within_the_train(self):
        # uniform angular acceleration from 15 to 22.5 Hz over 1 s: pulse k where
        # 15 t + 3.75 t^2 = k (kinematics); the mean speed over the pulse span is the
        # speed at its mid-time, to first order; one pulse lost still counts
        a, s0 = 7.5, 15.0
        k = np.arange(19)
        t = (-s0 + np.sqrt(s0**2 + 2 * a * k)) / a
        tach = speed_from_tach(np.delete(t, 9))
        assert tach.missing == 1
        assert tach.speed_hz == pytest.approx(s0 + a * (t[0] + t[-1]) / 2, rel=0.01)
        # revolutions since the first pulse at the pulse times: the parabola is exact
        assert tach.revolutions_at(t) == pytest.approx(k, abs=1e-6)

    @pytest.mark.parametrize(
        "times,match",
        [
            ([0.1], "at least 2 pulse times"),
            ([0.1, float("nan")], "finite"),
            ([0.2, 0.1], "strictly increasing"),
        ],
    )
    def test_bad_pulses(self, times, match):
        with pytest.raises(ValueError, match=f"pulse_times_s.*{match}|{match}"):
            speed_from_tach(times)


class TestDegenerateRecords:
    """Records with no noise or no signal must not crash the estimator."""

    def test_all_zero_record_is_a_clear_error(self):
        fs, n = 2560.0, 4096
        spec = sp.amplitude_spectrum(np.zeros(n), fs, "m/s^2")
        with pytest.raises(ValueError, match="no signal"):
            estimate_speed(spec, (5.0, 50.0), samples=np.zeros(n), fs_hz=fs)

    def test_noise_free_sine_gives_its_frequency(self):
        # a pure sinusoid: the estimate is its frequency (definition of frequency)
        fs, n, f0 = 2560.0, 4096, 24.37
        t = np.arange(n) / fs
        x = np.sin(2 * np.pi * f0 * t) + 0.3 * np.sin(2 * np.pi * 2 * f0 * t)
        spec = sp.amplitude_spectrum(x, fs, "m/s^2")
        est = estimate_speed(spec, (5.0, 50.0), samples=x, fs_hz=fs)
        assert est.speed_hz == pytest.approx(f0, abs=1e-6)
        assert np.isfinite(est.uncertainty_hz)
