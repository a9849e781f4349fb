"""Bearing defect frequencies and envelope analysis against published values and
closed-form signals."""

import json
import math
import subprocess
import sys

import numpy as np
import pytest
from scipy import constants, signal

from monitor.analysis.bearings import (
    analyse_bearing,
    choose_band,
    envelope_spectrum,
    spectral_kurtosis,
)
from monitor.analysis.spectrum import amplitude_at
from monitor.model.bearing_geometry import BearingGeometry

# CWRU bearing data set, drive-end bearing (open data set): 9 balls, d = 0.3126 in,
# D = 1.537 in, alpha = 0 (Case Western Reserve University bearing data set, drive-end bearing)
CWRU = BearingGeometry(9, 0.3126 * 25.4, 1.537 * 25.4)

FS = 12000.0
N = 12000  # 1 s, 1 Hz bins
T = np.arange(N) / FS
SHAFT_HZ = 29.95


def ringing_impacts(rate_hz, resonance_hz=3000.0, zeta=0.05, amplitude=1.0, n=N, fs=FS):
    """Closed form: impacts every 1/rate_hz s, each ringing an SDOF resonance,
    a(t) = A exp(-zeta w t) sin(w_d t) after the impact (Thomson, free damped vibration)."""
    t = np.arange(n) / fs
    w = 2 * np.pi * resonance_hz
    wd = w * math.sqrt(1 - zeta**2)
    x = np.zeros(n)
    for t0 in np.arange(0.0, n / fs, 1.0 / rate_hz):
        tau = t[t >= t0] - t0
        x[t >= t0] += amplitude * np.exp(-zeta * w * tau) * np.sin(wd * tau)
    return x


class TestGeometry:
    def test_cwru_defect_orders(self):
        # Randall and Antoni 2011 formulas; multiples published with the CWRU bearing data set:
        # BPFI 5.4152, BPFO 3.5848, FTF 0.39828, 2 x BSF 4.7135, within 1e-4
        o = CWRU.orders()
        assert o.unit == "order"
        assert o.bpfi == pytest.approx(5.4152, abs=1e-4)
        assert o.bpfo == pytest.approx(3.5848, abs=1e-4)
        assert o.ftf == pytest.approx(0.39828, abs=1e-4)
        assert 2 * o.bsf == pytest.approx(4.7135, abs=1e-4)

    def test_hz_scale_with_shaft_speed(self):
        # definition: a defect frequency is its order times shaft speed; published CWRU
        # BPFO multiple 3.5848 (published with the CWRU bearing data set) at 29.95 Hz
        f = CWRU.frequencies_hz(SHAFT_HZ)
        assert f.unit == "Hz"
        assert f.bpfo == pytest.approx(3.5848 * SHAFT_HZ, abs=1e-4 * SHAFT_HZ)
        assert f.as_dict().keys() == {"bpfo", "bpfi", "bsf", "ftf"}

    def test_contact_angle_formula(self):
        # Randall and Antoni 2011, section 2, evaluated here by hand for alpha = 15 deg
        g = BearingGeometry(12, 10.0, 50.0, 15.0)
        r = 10.0 / 50.0 * math.cos(math.radians(15.0))
        assert g.bpfo_order == pytest.approx(6 * (1 - r), rel=1e-12)
        assert g.bpfi_order == pytest.approx(6 * (1 + r), rel=1e-12)
        assert g.ftf_order == pytest.approx(0.5 * (1 - r), rel=1e-12)
        assert g.bsf_order == pytest.approx(50.0 / 20.0 * (1 - r * r), rel=1e-12)
        # kinematics: BPFO + BPFI = n x shaft speed (Randall and Antoni 2011)
        assert g.bpfo_order + g.bpfi_order == pytest.approx(12.0, rel=1e-12)

    def test_analysis_does_not_load_the_simulator(self):
        # one set of formulas, in the plant model: the analysis reads them without the
        # simulator (a later stage may build on an earlier one, never the other way)
        code = ("import sys, monitor.analysis.bearings, monitor.analysis.waveform; "
                "print(any(m.startswith('monitor.sim') for m in sys.modules))")
        out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                             check=True, timeout=60)
        assert out.stdout.strip() == "False"

    def test_from_settings(self):
        assert BearingGeometry.from_settings({"other": 1}) is None
        g = BearingGeometry.from_settings(
            {"bearing_elements": 9, "bearing_ball_diameter_mm": 7.94,
             "bearing_pitch_diameter_mm": 39.04}
        )
        assert g is not None and g.contact_angle_deg == 0.0 and g.n_elements == 9

    @pytest.mark.parametrize(
        ("change", "key"),
        [
            ({"bearing_elements": 2}, "bearing_elements"),
            ({"bearing_elements": 9.5}, "bearing_elements"),
            ({"bearing_elements": True}, "bearing_elements"),
            ({"bearing_ball_diameter_mm": 0}, "bearing_ball_diameter_mm"),
            ({"bearing_ball_diameter_mm": "8"}, "bearing_ball_diameter_mm"),
            ({"bearing_pitch_diameter_mm": 7.0}, "bearing_pitch_diameter_mm"),
            ({"bearing_contact_angle_deg": 90}, "bearing_contact_angle_deg"),
            ({"bearing_contact_angle_deg": -1}, "bearing_contact_angle_deg"),
        ],
    )
    def test_bad_settings_name_the_key(self, change, key):
        settings = {"bearing_elements": 9, "bearing_ball_diameter_mm": 8.0,
                    "bearing_pitch_diameter_mm": 40.0, **change}
        with pytest.raises(ValueError, match=key):
            BearingGeometry.from_settings(settings)

    def test_missing_key(self):
        with pytest.raises(ValueError, match="bearing_pitch_diameter_mm is missing"):
            BearingGeometry.from_settings(
                {"bearing_elements": 9, "bearing_ball_diameter_mm": 8.0}
            )

    def test_constructor_checks(self):
        with pytest.raises(ValueError, match="n_elements"):
            BearingGeometry(2, 8.0, 40.0)
        with pytest.raises(ValueError, match="contact_angle_deg"):
            BearingGeometry(9, 8.0, 40.0, 90.0)
        with pytest.raises(ValueError, match="ball_diameter"):
            BearingGeometry(9, 40.0, 8.0)


class TestSpectralKurtosis:
    def test_gaussian_noise_is_zero(self):
        # Antoni 2006: SK of a stationary Gaussian process is 0; the estimate's standard
        # deviation is about 2/sqrt(lines in the band) = 0.045 for 2000 lines (from
        # memory); 0.15 is more than three of them
        x = np.random.default_rng(3).normal(0, 1, N)
        assert spectral_kurtosis(x, FS, (2000.0, 4000.0)) == pytest.approx(0.0, abs=0.15)

    def test_sinusoid_is_minus_one(self):
        # Antoni 2006: a stationary sinusoid (constant envelope) has SK = -1
        x = np.cos(2 * np.pi * 3000.0 * T)
        assert spectral_kurtosis(x, FS, (2000.0, 4000.0)) == pytest.approx(-1.0, abs=1e-6)

    def test_impacts_are_impulsive(self):
        # Antoni 2006: repetitive transients give a large positive SK in their band
        x = ringing_impacts(100.0) + np.random.default_rng(4).normal(0, 0.05, N)
        assert spectral_kurtosis(x, FS, (2000.0, 4000.0)) > 2.0


class TestEnvelopeSpectrum:
    def test_amplitude_modulated_carrier(self):
        # closed form: A_c (1 + m cos 2 pi f_m t) cos 2 pi f_c t has envelope
        # A_c + m A_c cos 2 pi f_m t: a line at f_m of amplitude m A_c (Randall and
        # Antoni 2011, section 3); f_m between bins to include the interpolation
        a_c, m, f_c, f_m = 2.0, 0.4, 3000.0, 37.3
        x = a_c * (1 + m * np.cos(2 * np.pi * f_m * T)) * np.cos(2 * np.pi * f_c * T)
        env = envelope_spectrum(x, FS, (2500.0, 3500.0), "m/s^2")
        k = int(np.argmax(env.amplitude[5:200])) + 5
        assert env.freq_hz[k] == pytest.approx(f_m, abs=env.resolution_hz)
        assert amplitude_at(env, f_m, 1.0).amplitude == pytest.approx(m * a_c, rel=0.02)
        assert env.unit == "m/s^2" and env.scaling == "peak"

    def test_matches_scipy_hilbert_of_the_whole_band(self):
        # reference library: with every line of the signal inside the band, the envelope
        # is abs(scipy.signal.hilbert(x)) of the raw block
        x = (1 + 0.5 * np.cos(2 * np.pi * 40.0 * T)) * np.cos(2 * np.pi * 3000.0 * T)
        env = envelope_spectrum(x, FS, (2000.0, 4000.0), "m/s^2")
        ref = np.abs(signal.hilbert(x))
        w = signal.get_window("hann", N)
        ref_amp = np.abs(np.fft.rfft((ref - ref.mean()) * w)) * 2 / w.sum()
        assert env.amplitude[40] == pytest.approx(ref_amp[40], rel=1e-9)

    def test_bad_band(self):
        with pytest.raises(ValueError, match="band_hz"):
            envelope_spectrum(np.ones(N), FS, (4000.0, 2000.0), "m/s^2")
        with pytest.raises(ValueError, match="band_hz"):
            envelope_spectrum(np.ones(N), FS, (1000.0, 7000.0), "m/s^2")


class TestAnalyseBearing:
    bpfo = 3.5848 * SHAFT_HZ  # CWRU published multiple

    def defect(self, seed=5):
        noise = np.random.default_rng(seed).normal(0, 0.3, N)
        return ringing_impacts(self.bpfo) + noise

    def test_envelope_lines_of_ringing_impacts(self):
        # closed form: the envelope of one ring is A exp(-t/tau), tau = 1/(zeta w);
        # its periodic repetition at period P has Fourier amplitudes
        # 2 A tau / P / |1 + j 2 pi k tau / P| (exp(-P/tau) ~ 1e-4 neglected);
        # 10 %: the band-pass trims the resonance's skirts. Little noise: the envelope is
        # not linear, and noise of the ring's size flattens its modulation.
        # The band is given: without noise the sharp onset of each ring makes the far
        # bands (4-6 kHz) the most impulsive, as spectral kurtosis should find.
        x = ringing_impacts(self.bpfo) + np.random.default_rng(7).normal(0, 0.01, N)
        r = analyse_bearing(x, FS, SHAFT_HZ, CWRU, band_hz=(1500.0, 4500.0))
        tau, period = 1.0 / (0.05 * 2 * np.pi * 3000.0), 1.0 / self.bpfo
        for k in (1, 2, 3):
            expect = 2 * tau / period / abs(1 + 2j * np.pi * k * tau / period)
            assert r.harmonics["bpfo"][k - 1] == pytest.approx(expect, rel=0.10)

    def test_outer_race_defect_stands_above_a_healthy_block(self):
        r = analyse_bearing(self.defect(), FS, SHAFT_HZ, CWRU)
        healthy = analyse_bearing(np.random.default_rng(6).normal(0, 0.3, N), FS, SHAFT_HZ, CWRU)
        assert r.band.lo_hz <= 3000.0 <= r.band.hi_hz
        # the defect stands far above the same analysis of noise alone (common practice:
        # a developed localised defect is tens of dB above the envelope floor); noise
        # alone reads the largest of a few bins, some dB above the median
        assert r.indicator_db["bpfo"] > 20.0
        assert healthy.indicator_db["bpfo"] < 15.0
        assert r.indicator_db["bpfo"] > healthy.indicator_db["bpfo"] + 15.0
        # 2x BPFO is there too, well above the floor
        assert 20 * math.log10(r.harmonics["bpfo"][1] / r.floor) > 20.0
        # and the BPFI line (not a harmonic of BPFO within the 2 % window) stays low
        assert r.indicator_db["bpfi"] < 15.0

    def test_given_band_and_unit_g(self):
        x = self.defect()
        in_si = analyse_bearing(x, FS, SHAFT_HZ, CWRU, band_hz=(2000.0, 4000.0))
        in_g = analyse_bearing(x / constants.g, FS, SHAFT_HZ, CWRU, unit="g",
                               band_hz=(2000.0, 4000.0))
        assert in_si.band.source == "given"
        # 1 g = 9.80665 m/s^2 (3rd CGPM 1901): results are m/s^2 whatever the input unit
        assert in_g.harmonics["bpfo"][0] == pytest.approx(in_si.harmonics["bpfo"][0], rel=1e-9)
        assert in_g.indicator_db["bpfo"] == pytest.approx(in_si.indicator_db["bpfo"], abs=1e-9)

    def test_json(self):
        d = analyse_bearing(self.defect(), FS, SHAFT_HZ, CWRU).to_json()
        assert set(d) == {
            "band_hz", "band_source", "band_kurtosis", "shaft_hz", "frequencies_hz",
            "envelope", "harmonics", "bpfi_sidebands", "floor", "indicator_db", "unit",
        }
        for key in ("frequencies_hz", "envelope", "harmonics", "indicator_db"):
            assert set(d[key]) == {"bpfo", "bpfi", "bsf", "ftf"}
        assert len(d["harmonics"]["bpfo"]) == 3 and len(d["bpfi_sidebands"]) == 2
        assert d["envelope"]["bpfo"] == d["harmonics"]["bpfo"][0]
        assert d["envelope"]["bsf"] == d["harmonics"]["bsf"][1]  # ball defects show at 2x BSF
        json.dumps(d, allow_nan=False)

    def test_bad_arguments(self):
        x = self.defect()
        with pytest.raises(ValueError, match="unit"):
            analyse_bearing(x, FS, SHAFT_HZ, CWRU, unit="mm/s")
        with pytest.raises(ValueError, match="shaft_hz"):
            analyse_bearing(x, FS, 0.0, CWRU)
        with pytest.raises(ValueError, match="slip_pct"):
            analyse_bearing(x, FS, SHAFT_HZ, CWRU, slip_pct=-1.0)
        with pytest.raises(ValueError, match="geometry"):
            analyse_bearing(x, FS, SHAFT_HZ, (9, 8.0, 40.0))
        with pytest.raises(ValueError, match="fs_hz"):
            analyse_bearing(x, -1.0, SHAFT_HZ, CWRU)
        # 3 x BPFI at 29.95 Hz is ~490 Hz: no band twice that wide fits above it below
        # 600 Hz (fs 1200 Hz)
        with pytest.raises(ValueError, match="fs_hz"):
            choose_band(x, 1200.0, min_low_hz=490.0, min_width_hz=980.0)
