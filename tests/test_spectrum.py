"""Amplitude spectra against published window properties, scipy.signal and Parseval."""

import math

import numpy as np
import pytest
from scipy import constants, signal

from monitor.analysis import spectrum as sp
from monitor.analysis.record import Record, record_spectrum

FS = 2048.0


def sine(n, f, amp=1.0, phase=0.3, fs=FS):
    return amp * np.cos(2 * np.pi * f * np.arange(n) / fs + phase)


class TestHannWindow:
    def test_coherent_gain_and_enbw(self):
        # Harris 1978 (Proc. IEEE 66(1)), Table 1: Hann coherent gain 0.50, ENBW 1.50 bins
        w = sp.hann(4096)
        assert w.sum() / w.size == pytest.approx(0.5, abs=1e-12)
        assert w.size * np.sum(w**2) / w.sum() ** 2 == pytest.approx(1.5, abs=1e-12)

    def test_spectrum_reports_enbw_and_resolution(self):
        s = sp.amplitude_spectrum(np.random.default_rng(0).standard_normal(4096), FS, "g")
        assert s.resolution_hz == pytest.approx(FS / 4096)
        assert s.enbw_hz == pytest.approx(1.5 * FS / 4096)  # Harris 1978


class TestAmplitudeSpectrum:
    @pytest.mark.parametrize("offset", [0.0, 0.17, 0.5, 0.73])
    def test_off_bin_sine_amplitude_and_frequency(self, offset):
        # known answer: a sinusoid of amplitude 2.5 between bins, 40 dB SNR
        # (SNR = A^2 / (2 sigma^2) = 1e4); peak scaling within 0.5 %, frequency within
        # 0.01 bin (issue 2 targets)
        n = 8192
        df = FS / n
        f = (600 + offset) * df
        a = 2.5
        sigma = math.sqrt(a * a / 2 / 1e4)
        x = sine(n, f, a) + sigma * np.random.default_rng(1).standard_normal(n)
        spec = sp.amplitude_spectrum(x, FS, "m/s^2")
        (pk,) = sp.find_peaks(spec, count=1)
        assert pk.amplitude == pytest.approx(a, rel=0.005)
        assert abs(pk.hz - f) / df < 0.01

    def test_rms_scaling(self):
        n = 4096
        spec = sp.amplitude_spectrum(sine(n, 100 * FS / n, 2.0), FS, "g", scaling="rms")
        # definition: a sinusoid of peak A has RMS A / sqrt 2 (on-bin, so no scalloping)
        assert spec.amplitude[100] == pytest.approx(2.0 / math.sqrt(2), rel=1e-9)

    def test_agrees_with_scipy_periodogram(self):
        # scipy.signal.periodogram, scaling='spectrum': one-sided power A^2/2 for a sine;
        # our peak spectrum is sqrt(2 Pxx) away from DC/Nyquist, our RMS spectrum sqrt(Pxx)
        x = np.random.default_rng(2).standard_normal(2000) + sine(2000, 123.4, 3.0)
        _, pxx = signal.periodogram(x, FS, window="hann", scaling="spectrum", detrend="constant")
        peak = sp.amplitude_spectrum(x, FS, "g")
        rms = sp.amplitude_spectrum(x, FS, "g", scaling="rms")
        np.testing.assert_allclose(rms.amplitude, np.sqrt(pxx), rtol=1e-9, atol=1e-14)
        np.testing.assert_allclose(peak.amplitude[1:-1], np.sqrt(2 * pxx[1:-1]), rtol=1e-9)

    def test_sine_of_amplitude_2_gives_spectrum_peak_2(self):
        # scipy.signal.welch scaling='spectrum': sine of amplitude 2 -> A^2/2 = 2.0
        n = 4096
        x = sine(n, 64 * FS / n, 2.0)
        _, pxx = signal.welch(x, FS, window="hann", nperseg=n, scaling="spectrum")
        assert pxx[64] == pytest.approx(2.0, rel=1e-9)
        assert sp.amplitude_spectrum(x, FS, "g").amplitude[64] == pytest.approx(
            math.sqrt(2 * pxx[64]), rel=1e-9
        )

    @pytest.mark.parametrize("seg,overlap", [(1024, 0.5), (512, 0.0), (1000, 0.25)])
    def test_welch_averaging_agrees_with_scipy(self, seg, overlap):
        x = np.random.default_rng(3).standard_normal(10_000) + sine(10_000, 200.0, 1.5)
        noverlap = seg - int(round(seg * (1 - overlap)))
        _, pxx = signal.welch(
            x, FS, window="hann", nperseg=seg, noverlap=noverlap, scaling="spectrum"
        )
        s = sp.amplitude_spectrum(x, FS, "g", scaling="rms", segment_length=seg, overlap=overlap)
        np.testing.assert_allclose(s.amplitude, np.sqrt(pxx), rtol=1e-9, atol=1e-14)
        assert s.averages > 1

    def test_record_spectrum_equals_amplitude_spectrum(self):
        x = np.random.default_rng(4).standard_normal(3001) + 0.7
        r = Record.of(x, FS)
        np.testing.assert_allclose(
            record_spectrum(r, "g").amplitude,
            sp.amplitude_spectrum(x, FS, "g").amplitude,
            rtol=1e-9,
            atol=1e-14,
        )

    def test_float32_input(self):
        x = sine(4096, 100 * FS / 4096, 1.0).astype(np.float32)
        s = sp.amplitude_spectrum(x, FS, "g")
        assert s.amplitude.dtype == np.float64
        # analytic: the input amplitude of the on-bin sine; tolerance: 1e-5 allows float32
        # rounding of the samples (about 6e-8 each)
        assert s.amplitude[100] == pytest.approx(1.0, rel=1e-5)


class TestParseval:
    @pytest.mark.parametrize("seg", [None, 1024])
    def test_broadband_noise_rms(self, seg):
        # Parseval: the band RMS over all bins equals the time-domain RMS (numpy.std as the
        # reference); tolerance: 1 %, engineering choice: Hann windowing and Welch averaging
        # leave a small random difference on 65536 samples of noise
        x = np.random.default_rng(5).normal(0.0, 0.7, 65536)
        s = sp.amplitude_spectrum(x, FS, "m/s^2", segment_length=seg)
        assert sp.band_rms(s, 0.0, FS / 2) == pytest.approx(np.std(x), rel=0.01)

    def test_sine_band_rms(self):
        # a sinusoid of peak A has RMS A / sqrt 2, wherever it falls between bins
        x = sine(8192, 100.37, 2.0)
        s = sp.amplitude_spectrum(x, FS, "g")
        # tolerance: 0.2 %, engineering choice: the band holds the whole Hann main lobe
        assert sp.band_rms(s, 90, 110) == pytest.approx(2.0 / math.sqrt(2), rel=0.002)

    def test_band_limits_noise(self):
        # white noise: the power in a band is proportional to its width (density)
        x = np.random.default_rng(6).normal(0.0, 1.0, 65536)
        s = sp.amplitude_spectrum(x, FS, "g", segment_length=2048)
        expected = math.sqrt((400 - 100) / (FS / 2))
        # tolerance: 3 %, engineering choice: the band power of 65536 samples of noise over
        # 300 of 1024 Hz scatters by about 1 % (chi-square, textbook statistics)
        assert sp.band_rms(s, 100, 400) == pytest.approx(expected, rel=0.03)


class TestIntegration:
    def test_acceleration_to_velocity(self):
        # V = A / (2 pi f) within 0.5 % (issue 2 target)
        f = 157.3
        x = sine(16384, f, 3.0)
        v = sp.integrate(sp.amplitude_spectrum(x, FS, "m/s^2"), "velocity", f_low_hz=10)
        (pk,) = sp.find_peaks(v, 1)
        assert v.unit == "mm/s"
        assert pk.amplitude == pytest.approx(3.0 / (2 * math.pi * f) * 1e3, rel=0.005)

    def test_one_g_at_100_hz(self):
        # 1 g peak at 100 Hz = 15.608 mm/s peak = 11.036 mm/s RMS (computed: g / (2 pi 100))
        n = 16384
        f = 100 * n / FS / n * FS  # exactly on a bin: 800
        x = sine(n, 100.0, 1.0)
        spec = sp.amplitude_spectrum(x, FS, "g")
        v_pk = sp.integrate(spec, "velocity")
        v_rms = sp.integrate(sp.amplitude_spectrum(x, FS, "g", scaling="rms"), "velocity")
        k = int(round(f * n / FS))
        assert v_pk.amplitude[k] == pytest.approx(constants.g / (2 * math.pi * 100) * 1e3, rel=1e-9)
        assert v_pk.amplitude[k] == pytest.approx(15.608, abs=5e-4)
        assert v_rms.amplitude[k] == pytest.approx(11.036, abs=5e-4)

    def test_double_integration_and_cutoff(self):
        # D = A / (2 pi f)^2; bins below the cut-off are zero
        x = sine(16384, 50.0, 9.80665)
        d = sp.integrate(sp.amplitude_spectrum(x, FS, "m/s^2"), "displacement", f_low_hz=20)
        assert d.unit == "um"
        k = int(round(50.0 * 16384 / FS))
        assert d.amplitude[k] == pytest.approx(9.80665 / (2 * math.pi * 50) ** 2 * 1e6, rel=1e-9)
        assert np.all(d.amplitude[d.freq_hz < 20] == 0)

    def test_differentiate_displacement(self):
        # V = 2 pi f D
        x = sine(8192, 64 * FS / 8192, 100.0)
        v = sp.differentiate(sp.amplitude_spectrum(x, FS, "um"), "velocity")
        assert v.amplitude[64] == pytest.approx(2 * math.pi * 16.0 * 100e-3, rel=1e-9)

    def test_wrong_direction(self):
        s = sp.amplitude_spectrum(sine(1024, 100, 1.0), FS, "um")
        with pytest.raises(ValueError, match="to 'velocity'"):
            sp.integrate(s, "velocity")


class TestPeaks:
    def test_peaks_sorted_and_interpolated(self):
        x = sine(8192, 100.3, 1.0) + sine(8192, 333.71, 2.0)
        peaks = sp.find_peaks(sp.amplitude_spectrum(x, FS, "g"), count=2)
        # analytic: the frequencies and amplitude of the synthesised sines, largest first;
        # tolerance: 1e-4, engineering choice for noise-free between-bin interpolation
        assert [round(p.hz, 2) for p in peaks] == [333.71, 100.3]
        assert peaks[0].amplitude == pytest.approx(2.0, rel=1e-4)

    def test_amplitude_at(self):
        x = sine(8192, 100.3, 1.0) + sine(8192, 101.9, 0.2)
        pk = sp.amplitude_at(sp.amplitude_spectrum(x, FS, "g"), 100.0, tolerance_hz=0.6)
        # analytic: the 100.3 Hz sine of amplitude 1; tolerance: 1 %, engineering choice for
        # the leakage of the 0.2 neighbour 1.6 Hz (6.4 bins) away
        assert pk.hz == pytest.approx(100.3, abs=0.01)
        assert pk.amplitude == pytest.approx(1.0, rel=0.01)


class TestRecordDtft:
    def test_against_direct_sum(self):
        # definition of the DTFT, summed directly, of the mean-removed record
        x = np.random.default_rng(7).standard_normal(5001) + 0.4
        xm = x - x.mean()
        f = np.array([3.21, 100.0, 777.7])
        m = np.arange(x.size)
        rec = Record.of(x, FS)
        for window, w in ((False, np.ones(x.size)), (True, sp.hann(x.size))):
            ref = np.array([np.sum(w * xm * np.exp(-2j * np.pi * ff * m / FS)) for ff in f])
            np.testing.assert_allclose(
                rec.dtft(f, window=window, half_width=2500), ref, rtol=1e-9, atol=1e-8
            )
        # the default Hann path keeps 64 bins either side: near-exact (1/d^3 weights);
        # tolerance: 1e-4 of the largest value, engineering choice for the truncated sum
        refw = np.array([np.sum(sp.hann(x.size) * xm * np.exp(-2j * np.pi * ff * m / FS)) for ff in f])
        np.testing.assert_allclose(rec.dtft(f, window=True), refw, rtol=0, atol=1e-4 * np.abs(refw).max())


class TestBadInput:
    @pytest.mark.parametrize(
        "samples,fs,unit,match",
        [
            ([], FS, "g", "samples has 0 values"),
            (np.ones(5), FS, "g", "samples has 5 values"),
            (np.r_[np.ones(100), np.nan], FS, "g", "samples must be finite; sample 100"),
            (np.r_[np.ones(100), np.inf], FS, "g", "samples must be finite"),
            (np.ones(100), 0.0, "g", "fs_hz must be a positive"),
            (np.ones(100), -5.0, "g", "fs_hz must be a positive"),
            (np.ones(100), float("nan"), "g", "fs_hz must be a positive"),
            (np.ones(100), FS, "ft/s^2", "unit 'ft/s\\^2' is not a known unit"),
            (np.ones((10, 10)), FS, "g", "samples must be a 1-D array"),
        ],
    )
    def test_rejected_with_name(self, samples, fs, unit, match):
        with pytest.raises(ValueError, match=match):
            sp.amplitude_spectrum(samples, fs, unit)

    def test_bad_options(self):
        x = np.ones(100)
        with pytest.raises(ValueError, match="scaling 'power'"):
            sp.amplitude_spectrum(x, FS, "g", scaling="power")
        with pytest.raises(ValueError, match="segment_length"):
            sp.amplitude_spectrum(x, FS, "g", segment_length=1000)
        with pytest.raises(ValueError, match="overlap"):
            sp.amplitude_spectrum(x, FS, "g", segment_length=50, overlap=1.0)
        s = sp.amplitude_spectrum(x, FS, "g")
        with pytest.raises(ValueError, match="f_hi_hz"):
            sp.band_rms(s, 100, 10)
        with pytest.raises(ValueError, match="f_lo_hz"):
            sp.band_rms(s, -1, 10)
