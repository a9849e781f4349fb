"""Impact (bump) tests: the frequency response, half-power damping, the checks of each hit
on the force channel, the noise floor and the coherence a mode must pass, three modes of a
closed-form structure, and the ``bumptest`` command's refusals.

Expected values come from textbook formulas (Thomson, *Theory of Vibration with
Applications*; Ewins, *Modal Testing*), the Fourier transform of the signals built here,
Gaussian statistics, or scipy as an independent reference. The signals are closed-form
responses or scipy's ``lsim`` of the structure's equations of motion.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from scipy import linalg, signal

from monitor.cli import main
from monitor.io.streams import reading_message, write_stream
from monitor.model.readings import Waveform
from monitor.model.registry import Machine, Mode, Point, Registry
from monitor.model.registry_file import dump_registry
from monitor.modes.frequency_response import frequency_response
from monitor.modes.hits import check_hit
from monitor.modes.impact import ImpactRefused, bump_test
from monitor.modes.peaks import half_power_points

T0 = 1772431200.0  # 2026-03-02T06:00:00Z


def sdof_impulse(fn_hz: float, zeta: float, fs_hz: float, decays: float = 10.0,
                 mass: float = 1.0) -> np.ndarray:
    """h(t) = exp(-zeta wn t) sin(wd t) / (m wd): displacement per unit impulse (Thomson,
    impulse response of the damped SDOF system), over ``decays`` time constants."""
    wn = 2 * math.pi * fn_hz
    wd = wn * math.sqrt(1 - zeta * zeta)
    t = np.arange(int(decays / (zeta * wn) * fs_hz)) / fs_hz
    return np.exp(-zeta * wn * t) * np.sin(wd * t) / (mass * wd)


def half_power_ratios(zeta: float) -> tuple[float, float]:
    """Half-power frequency ratios r1, r2 of the SDOF receptance
    1 / sqrt((1 - r^2)^2 + (2 zeta r)^2) (Thomson, forced SDOF response): setting its square
    to half the peak value 1 / (4 zeta^2 (1 - zeta^2)) gives
    r^2 = 1 - 2 zeta^2 -+ 2 zeta sqrt(1 - zeta^2)."""
    c = 1 - 2 * zeta**2
    d = 2 * zeta * math.sqrt(1 - zeta**2)
    return math.sqrt(c - d), math.sqrt(c + d)




# ----------------------------------------------------------------------------- half power


class TestHalfPower:
    @pytest.mark.parametrize("zeta", [0.01, 0.02, 0.05])
    def test_closed_form_impulse_response(self, zeta: float) -> None:
        fs, fn = 1000.0, 20.0
        h = sdof_impulse(fn, zeta, fs)
        test = bump_test(h, fs, quantity="displacement", unit="m", band_hz=(5, 50))
        assert len(test.modes) == 1
        m = test.modes[0]
        # receptance peak at r = sqrt(1 - 2 zeta^2) (Thomson, forced SDOF response)
        assert m.frequency_hz == pytest.approx(fn * math.sqrt(1 - 2 * zeta**2), rel=1e-4)
        r1, r2 = half_power_ratios(zeta)
        assert m.half_power_hz is not None
        # half-power points of the SDOF receptance (Thomson; half_power_ratios); tolerance:
        # 5e-4, engineering choice for a noise-free sampled response
        assert m.half_power_hz[0] == pytest.approx(fn * r1, rel=5e-4)
        assert m.half_power_hz[1] == pytest.approx(fn * r2, rel=5e-4)
        # zeta = (f2 - f1) / (2 f_n): the half-power estimate is biased by O(zeta^2);
        # tolerance 1 % of zeta covers it up to zeta = 0.05 (0.5 % there, computed from
        # the r1, r2 formula)
        assert m.damping_ratio_half_power == pytest.approx(zeta, rel=1e-2)
        # tolerance: 0.5 %, engineering choice: the decrement of a noise-free decay is exact
        # up to sampling of the peaks
        assert m.damping_ratio_decrement == pytest.approx(zeta, rel=5e-3)
        # API 684 AF = f_n / (f2 - f1) ~ 1 / (2 zeta) for light damping
        assert m.amplification_factor == pytest.approx(1 / (2 * zeta), rel=1e-2)
        assert m.fit is not None
        # analytic: the fn and zeta of the closed-form impulse response; tolerances
        # 1e-4 / 1e-3, engineering choice for a noise-free curve fit
        assert m.fit.frequency_hz == pytest.approx(fn, rel=1e-4)
        assert m.fit.damping_ratio == pytest.approx(zeta, rel=1e-3)
        assert m.fit.damping_ratio_std < 0.01 * zeta

    def test_reference_values_zeta_005(self) -> None:
        # half_power_ratios' closed form (Thomson): zeta = 0.05 -> r = 0.946111, 1.046363
        r1, r2 = half_power_ratios(0.05)
        assert (r1, r2) == (pytest.approx(0.946111, abs=1e-6), pytest.approx(1.046363, abs=1e-6))
        # the same points found numerically on |H(r)| sampled by scipy.signal.freqs
        r = np.linspace(0.8, 1.2, 40001)
        _, h = signal.freqs([1], [1, 2 * 0.05, 1], worN=r)
        k = int(np.argmax(np.abs(h)))
        hp = half_power_points(r, np.abs(h), k)
        assert hp == (pytest.approx(0.946111, abs=2e-5), pytest.approx(1.046363, abs=2e-5))

    def test_unresolved_side_gives_none(self) -> None:
        f = np.linspace(0, 10, 101)
        m = np.exp(-((f - 1.0) ** 2))  # never falls to 0.707 of the peak left of f = 0.4
        assert half_power_points(f, m, 10, lo_index=5) is None


# ----------------------------------------------------------------------------- FRF


class TestFrequencyResponse:
    FS, FN, ZETA, MASS = 4096.0, 30.0, 0.02, 2.0

    def _hit(self, rng: np.random.Generator | None = None, noise: float = 0.0):
        wn = 2 * math.pi * self.FN
        n = int(12 / (self.ZETA * wn) * self.FS)
        t = np.arange(n) / self.FS
        f = np.zeros(n)
        width = 0.002  # half-sine hammer pulse, s
        on = (t >= 0.01) & (t < 0.01 + width)
        f[on] = 100.0 * np.sin(np.pi * (t[on] - 0.01) / width)
        sys = signal.lti([1 / self.MASS], [1, 2 * self.ZETA * wn, wn * wn])
        _, y, _ = signal.lsim(sys, f, t)
        if rng is not None:
            f = f + rng.normal(0, noise, n)
            y = y + rng.normal(0, noise * 1e-4, n)
        return f, y

    def test_h1_matches_scipy_freqs(self) -> None:
        f, y = self._hit()
        frf = frequency_response(y, self.FS, force=f, quantity="displacement", unit="m")
        wn = 2 * math.pi * self.FN
        _, ref = signal.freqs([1 / self.MASS], [1, 2 * self.ZETA * wn, wn * wn],
                              worN=2 * math.pi * frf.freq_hz)
        band = (frf.freq_hz > 0.5 * self.FN) & (frf.freq_hz < 2 * self.FN)
        ratio = frf.response[band] / ref[band]
        # sampled (lsim) vs continuous system: 0.5 % and 0.5 deg over 0.5-2 f_n
        assert np.max(np.abs(np.abs(ratio) - 1)) < 5e-3
        assert np.max(np.abs(np.degrees(np.angle(ratio)))) < 0.5
        assert frf.kind == "H1" and frf.unit == "m/N"

    def test_coherence_against_scipy(self) -> None:
        rng = np.random.default_rng(7)
        hits = [self._hit(rng, noise=0.5) for _ in range(5)]
        F = np.array([h[0] for h in hits])
        Y = np.array([h[1] for h in hits])
        test = bump_test(Y, self.FS, force=F, quantity="displacement", unit="m",
                               band_hz=(5, 200))
        frf = test.frf
        n = F.shape[1]
        # scipy.signal.coherence over the concatenated hits, one boxcar segment per hit
        fr, coh = signal.coherence(F.ravel(), Y.ravel(), fs=self.FS, window="boxcar",
                                   nperseg=n, noverlap=0, nfft=frf.freq_hz.size * 2 - 2,
                                   detrend=False)
        assert np.allclose(fr, frf.freq_hz)
        assert np.allclose(frf.coherence, coh, atol=1e-9)
        (m,) = test.modes
        assert m.coherence is not None and m.coherence > 0.95
        assert m.fit is not None
        # analytic: FN and ZETA of the simulated system; tolerances 0.2 % / 5 %, engineering
        # choice for five hits with added force and response noise
        assert m.fit.frequency_hz == pytest.approx(self.FN, rel=2e-3)
        assert m.fit.damping_ratio == pytest.approx(self.ZETA, rel=0.05)
        assert m.decrement_hits == 5

    def test_single_hit_response_spectrum_is_proportional_to_receptance(self) -> None:
        h = sdof_impulse(self.FN, self.ZETA, self.FS)
        frf = frequency_response(h, self.FS, quantity="displacement", unit="m")
        wn = 2 * math.pi * self.FN
        _, ref = signal.freqs([1], [1, 2 * self.ZETA * wn, wn * wn],
                              worN=2 * math.pi * frf.freq_hz)
        band = (frf.freq_hz > 0.5 * self.FN) & (frf.freq_hz < 2 * self.FN)
        # Fourier transform of the impulse response = receptance (unit impulse, m = 1);
        # the sampled sum approximates the integral to 0.2 % over 0.5-2 f_n at fs = 4096 Hz
        assert np.allclose(frf.response[band], np.abs(ref[band]), rtol=2e-3)

    def test_two_close_modes_separated(self) -> None:
        fs = 1024.0
        h = sdof_impulse(30.0, 0.01, fs, decays=12)
        h2 = sdof_impulse(34.0, 0.01, fs, decays=12)
        n = min(h.size, h2.size)
        test = bump_test(h[:n] + 0.8 * h2[:n], fs, quantity="displacement", unit="m",
                               band_hz=(10, 60))
        assert len(test.modes) == 2
        for m, fn in zip(test.modes, (30.0, 34.0), strict=True):
            # peak of each receptance at fn sqrt(1 - 2 zeta^2), shifted a little by the
            # other mode: 0.2 %
            assert m.frequency_hz == pytest.approx(fn, rel=2e-3)
            # analytic: zeta 0.01 of both simulated modes; tolerance: 5 %, engineering choice
            # for the other mode's skirt overlapping the half-power band
            assert m.damping_ratio_half_power == pytest.approx(0.01, rel=0.05)
            assert m.damping_ratio_decrement == pytest.approx(0.01, rel=0.05)

    @pytest.mark.parametrize("kwargs, word", [
        (dict(response=np.zeros(100), fs_hz=0.0), "fs_hz"),
        (dict(response=np.r_[np.zeros(99), np.nan], fs_hz=100.0), "response"),
        (dict(response=np.zeros(8), fs_hz=100.0), "response"),
        (dict(response=np.zeros(100), fs_hz=100.0, force=np.zeros(99)), "force"),
        (dict(response=np.zeros(100), fs_hz=100.0, quantity="jerk"), "quantity"),
        (dict(response=np.zeros(100), fs_hz=100.0, pad_factor=0), "pad_factor"),
    ])
    def test_bad_input(self, kwargs: dict, word: str) -> None:
        with pytest.raises(ValueError, match=word):
            frequency_response(**kwargs)

    def test_bad_band(self) -> None:
        with pytest.raises(ValueError, match="band_hz"):
            bump_test(np.ones(256), 100.0, band_hz=(30, 10))




# ----------------------------------------------------------------------------- hits


def half_sine(t: np.ndarray, start_s: float, width_s: float, peak: float) -> np.ndarray:
    """A half-sine force pulse (the usual model of a hammer's contact force), N."""
    f = np.zeros(t.size)
    on = (t >= start_s) & (t < start_s + width_s)
    f[on] = peak * np.sin(np.pi * (t[on] - start_s) / width_s)
    return f


def sdof_acceleration(force: np.ndarray, fs: float, fn: float, zeta: float,
                      mass: float) -> np.ndarray:
    """Acceleration of a mass-spring-damper under ``force``: accelerance
    s^2 / (m (s^2 + 2 zeta wn s + wn^2)) (Thomson, forced SDOF response), by lsim."""
    wn = 2 * math.pi * fn
    t = np.arange(force.size) / fs
    _, a, _ = signal.lsim(signal.lti([1 / mass, 0, 0], [1, 2 * zeta * wn, wn * wn]), force, t)
    return a


class TestHitChecks:
    def test_clean_hit_width_and_noise(self) -> None:
        fs, width = 51200.0, 0.002
        t = np.arange(int(fs)) / fs
        rng = np.random.default_rng(11)
        c = check_hit(half_sine(t, 0.01, width, 200.0) + rng.normal(0, 0.05, t.size), fs)
        assert c.accepted and len(c.pulses) == 1
        # a half-sine of duration T stays above 10 % of its peak for T (1 - 2 asin(0.1) / pi)
        # (closed form); tolerance one sample
        assert c.width_s == pytest.approx(width * (1 - 2 * math.asin(0.1) / math.pi), abs=1 / fs)
        # 1.4826 MAD estimates the sigma of Gaussian noise (Rousseeuw and Croux, 1993);
        # tolerance 15 %, engineering choice: the quietest of eight 6400-sample segments
        assert c.noise == pytest.approx(0.05, rel=0.15)
        assert c.peak == pytest.approx(200.0, rel=1e-3)

    def test_noise_only_is_no_hit(self) -> None:
        rng = np.random.default_rng(1)
        c = check_hit(rng.normal(0, 1.0, 4096), 2048.0)
        # the largest of N Gaussian samples is about sqrt(2 ln N) sigma = 4.1 sigma for
        # N = 4096 (extreme-value statistics): far below the 10 sigma a hit needs
        assert [k for k, _ in c.problems] == ["no_hit"]
        assert abs(c.peak) < 5.0 and c.message().startswith("no hit: the largest force")

    def test_clipped_hammer(self) -> None:
        # a 300 N half-sine read through a channel that saturates at 150 N (the case)
        fs = 2048.0
        t = np.arange(4096) / fs
        rng = np.random.default_rng(2)
        f = np.minimum(half_sine(t, 0.01, 0.003, 300.0) + rng.normal(0, 0.05, t.size), 150.0)
        c = check_hit(f, fs)
        assert [k for k, _ in c.problems] == ["clipped"]
        # sin > 1/2 over the middle 2/3 of the 3 ms pulse: 4 samples at 2048 Hz
        assert c.flat_samples == 4
        assert "flat at 150 N for 4 samples" in c.message()

    def test_stated_range(self) -> None:
        fs = 2048.0
        t = np.arange(4096) / fs
        c = check_hit(half_sine(t, 0.01, 0.003, 300.0), fs, force_range=250.0)
        assert [k for k, _ in c.problems] == ["over_range"]
        assert "stated range of 250 N" in c.message()

    @pytest.mark.parametrize("second, double", [(0.4, True), (0.05, False)])
    def test_double_hit(self, second: float, double: bool) -> None:
        fs, width = 51200.0, 0.002
        t = np.arange(int(fs)) / fs
        rng = np.random.default_rng(3)
        f = (half_sine(t, 0.01, width, 200.0) + half_sine(t, 0.022, width, second * 200.0)
             + rng.normal(0, 0.05, t.size))
        c = check_hit(f, fs)
        # a second pulse a x the first, tau later, makes the force spectrum
        # F(f) (1 + a exp(-2 pi j f tau)) (Fourier shift theorem): +-40 % ripple is a
        # double hit, +-5 % is below the 10 % rule
        assert c.accepted is not double
        if double:
            assert [k for k, _ in c.problems] == ["double_hit"]
            # the two peaks are 12 ms apart by construction
            assert "+12.0 ms" in c.message() and "80 N" in c.message()

    def test_push_is_not_an_impact(self) -> None:
        fs = 2048.0
        rng = np.random.default_rng(4)
        f = rng.normal(0, 0.1, 4096)
        f[1000:2000] += 50.0  # held for 0.49 s of a 2 s record
        c = check_hit(f, fs)
        assert [k for k, _ in c.problems] == ["not_impact"]


# ----------------------------------------------------------------------------- refusals


class TestRefusals:
    FS, FN, ZETA, MASS = 2048.0, 42.0, 0.02, 5.0

    def _hit(self, peak: float = 300.0) -> tuple[np.ndarray, np.ndarray]:
        t = np.arange(4096) / self.FS
        f = half_sine(t, 0.01, 0.003, peak)
        return f, sdof_acceleration(f, self.FS, self.FN, self.ZETA, self.MASS)

    def test_noise_on_both_channels_is_refused(self) -> None:
        # Before: six "modes" with damping 0.0000-0.0002 and AF up to 17,391.
        rng = np.random.default_rng(1)
        with pytest.raises(ImpactRefused, match=r"^no hit: the largest force") as exc:
            bump_test(rng.normal(0, 0.01, 4096), self.FS, force=rng.normal(0, 1.0, 4096))
        assert [k for k, _ in exc.value.checks[0].problems] == ["no_hit"]

    def test_clipped_hit_is_left_out_of_the_average(self) -> None:
        f, a = self._hit()
        forces = np.array([f, np.minimum(f, 150.0), f * 0.8])
        accs = np.array([a, a, a * 0.8])
        test = bump_test(accs, self.FS, force=forces, band_hz=(10, 200))
        assert [c.accepted for c in test.hits] == [True, False, True] and test.frf.hits == 2
        (m,) = test.modes
        # accelerance peak |H| = 1 / (2 zeta sqrt(1 - zeta^2) m) (Thomson, forced SDOF
        # response) = 5.001 m/s^2/N; the clipped hit alone gives 54 % more. Tolerance 1 %,
        # engineering choice for the sampled response.
        assert m.magnitude == pytest.approx(1 / (2 * self.ZETA * math.sqrt(1 - self.ZETA**2) * self.MASS),
                                            rel=0.01)
        with pytest.raises(ImpactRefused, match="all 2 hits were refused: hit 1: the force is flat"):
            bump_test(accs[:2], self.FS, force=np.array([forces[1], forces[1]]))

    def test_a_dead_response_gives_no_mode(self) -> None:
        # a clean hit, but the response channel holds noise only: every peak of H1 is noise
        f, _ = self._hit()
        rng = np.random.default_rng(5)
        test = bump_test(rng.normal(0, 0.05, (3, f.size)), self.FS, force=np.array([f] * 3))
        assert test.modes == () and test.rejected
        assert {r.reason for r in test.rejected} == {"noise_floor"}

    @pytest.mark.parametrize("hits", [1, 4])
    def test_noise_without_force_channel_gives_no_mode(self, hits: int) -> None:
        rng = np.random.default_rng(6)
        test = bump_test(rng.normal(0, 1.0, (hits, 4096)).squeeze(), self.FS)
        assert test.modes == ()

    def test_disturbance_the_hammer_did_not_cause_has_low_coherence(self) -> None:
        # a 120 Hz tone from a machine running nearby, its phase random at each hit: it is
        # not caused by the measured force, so its coherence is low (Bendat and Piersol,
        # ordinary coherence); the mode keeps a coherence near 1
        rng = np.random.default_rng(7)
        t = np.arange(4096) / self.FS
        forces, accs = [], []
        for k in range(5):
            f, a = self._hit(300.0 * (1 + 0.1 * k))
            forces.append(f + rng.normal(0, 0.1, t.size))
            accs.append(a + 3.0 * np.sin(2 * np.pi * 120.0 * t + rng.uniform(0, 2 * np.pi))
                        + rng.normal(0, 0.05, t.size))
        test = bump_test(np.array(accs), self.FS, force=np.array(forces), band_hz=(10, 200))
        (m,) = test.modes
        assert m.frequency_hz == pytest.approx(self.FN, rel=1e-3) and m.coherence > 0.99
        (r,) = test.rejected
        assert r.reason == "coherence" and r.frequency_hz == pytest.approx(120.0, abs=0.5)
        assert "below the 0.9 required" in r.message


# ----------------------------------------------------------------------------- 3 modes


class TestThreeModeChain:
    """Three equal masses m in a chain of equal springs k, fixed at one end, free at the
    other; hammer and accelerometer on the mass next to the ground."""

    K, M, FS, SECONDS = 1.0e5, 1.0, 2048.0, 6.0
    ZETA = (0.02, 0.015, 0.01)  # modal damping ratios

    def natural_frequencies(self) -> np.ndarray:
        # fixed-free chain of N equal masses and springs:
        # omega_r = 2 sqrt(k / m) sin((2r - 1) pi / (2 (2N + 1))), N = 3 (closed form)
        r = np.arange(1, 4)
        return np.sqrt(self.K / self.M) * np.sin((2 * r - 1) * np.pi / 14) / np.pi

    def _hits(self, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
        m = self.M * np.eye(3)
        k = self.K * np.array([[2.0, -1.0, 0.0], [-1.0, 2.0, -1.0], [0.0, -1.0, 1.0]])
        lam, phi = linalg.eigh(k, m)  # mass-normalised mode shapes
        # scipy's eigenvalues against the closed form: 1e-9
        assert np.sqrt(lam) / (2 * np.pi) == pytest.approx(self.natural_frequencies(), rel=1e-9)
        t = np.arange(int(self.SECONDS * self.FS)) / self.FS
        forces, accs = [], []
        for _ in range(5):
            f = half_sine(t, 0.05, 0.003, 200.0 * (1 + 0.1 * rng.normal()))
            # modal superposition (Ewins, Modal Testing): x_1 = sum_r phi_1r^2 q_r with
            # q_r'' + 2 zeta_r w_r q_r' + w_r^2 q_r = f(t)
            a = sum(sdof_acceleration(phi[0, r] ** 2 * f, self.FS, math.sqrt(lam[r]) / (2 * np.pi),
                                      self.ZETA[r], 1.0) for r in range(3))
            # noise: force 0.1 N rms, acceleration 0.05 m/s^2 rms (5 mg; an accelerometer
            # with its conditioning, from memory)
            forces.append(f + rng.normal(0, 0.1, t.size))
            accs.append(a + rng.normal(0, 0.05, t.size))
        return np.array(forces), np.array(accs)

    def test_three_modes_within_1_pct_and_15_pct(self) -> None:
        forces, accs = self._hits(np.random.default_rng(12))
        test = bump_test(accs, self.FS, force=forces, band_hz=(5, 200))
        assert all(c.accepted for c in test.hits) and test.rejected == ()
        assert len(test.modes) == 3
        for m, fn, zeta in zip(test.modes, self.natural_frequencies(), self.ZETA, strict=True):
            # frequency within 1 %: the accelerance peak lies within zeta^2 of fn (Thomson)
            assert m.frequency_hz == pytest.approx(fn, rel=0.01)
            # half-power zeta = (f2 - f1) / (2 fn) (Thomson; Ewins) and the logarithmic
            # decrement (Thomson, section 2.7) within 15 %
            assert m.damping_ratio_half_power == pytest.approx(zeta, rel=0.15)
            assert m.damping_ratio == pytest.approx(zeta, rel=0.15)
            assert m.coherence is not None and m.coherence >= 0.9
            assert m.noise_margin_db is not None and m.noise_margin_db >= 20.0


# ----------------------------------------------------------------------------- CLI


def _run(args: list[str]) -> tuple[int, list[dict], str, str]:
    result = CliRunner().invoke(main, args)
    lines = [json.loads(x) for x in result.stdout.splitlines() if x.startswith("{")]
    return result.exit_code, lines, result.stdout, result.stderr


class TestBumptestRefusals:
    FS, FN, ZETA, MASS = 2048.0, 42.0, 0.02, 5.0

    def _stream(self, tmp_path: Path, forces: list[np.ndarray],
                responses: list[np.ndarray]) -> Path:
        msgs = []
        for k, (f, a) in enumerate(zip(forces, responses, strict=True)):
            ts = T0 + 30.0 * k
            msgs.append(reading_message(Waveform("tb-1", "top-h", ts, self.FS, "m/s^2", a)))
            msgs.append(reading_message(Waveform("tb-1", "hammer", ts, self.FS, "N", f)))
        path = tmp_path / "bump.jsonl"
        write_stream(path, msgs)
        return path

    def _hit(self, peak: float = 300.0) -> tuple[np.ndarray, np.ndarray]:
        t = np.arange(4096) / self.FS
        f = half_sine(t, 0.01, 0.003, peak)
        return f, sdof_acceleration(f, self.FS, self.FN, self.ZETA, self.MASS)

    def test_noise_record_refused_without_a_mode_shift_alarm(self, tmp_path: Path,
                                                             database_url: str) -> None:
        from sqlalchemy import func, select

        from monitor.store import Store, upgrade
        from monitor.store.models import Alarm

        rng = np.random.default_rng(1)
        stream = self._stream(tmp_path, [rng.normal(0, 1.0, 4096)], [rng.normal(0, 0.01, 4096)])
        code, docs, _, err = _run(["bumptest", str(stream), "--force-point", "hammer", "--json"])
        assert code == 1 and docs == []
        assert ("bump.jsonl: force channel tb-1/hammer, hit at 2026-03-02T06:00:00Z for "
                "tb-1/top-h: no hit: the largest force") in err
        assert err.strip().endswith("N.")
        reg = tmp_path / "m.toml"
        reg.write_text(dump_registry(Registry((Machine(
            id="tb-1", points=(Point("top-h", "horizontal", "acceleration", "m/s^2"),),
            modes=(Mode("frame", 46.0, damping_ratio=0.02),)),))))
        upgrade(database_url)
        assert _run(["machines", "import", str(reg), "--database", database_url])[0] == 0
        code, docs, _, err = _run(["bumptest", str(stream), "--record", "--database", database_url,
                                   "--force-point", "hammer", "--json"])
        assert code == 1 and docs == [] and "no hit" in err
        store = Store.open(database_url)
        try:
            with store.session() as s:
                assert s.execute(select(func.count()).select_from(Alarm)).scalar_one() == 0
        finally:
            store.close()

    def test_clipped_hammer_refused(self, tmp_path: Path) -> None:
        f, a = self._hit()
        stream = self._stream(tmp_path, [np.minimum(f, 150.0)], [a])
        code, docs, out, err = _run(["bumptest", str(stream), "--force-point", "hammer"])
        assert code == 1 and "no mode" not in out
        assert "the force is flat at 150 N for 4 samples at its peak" in err

    def test_stated_range(self, tmp_path: Path) -> None:
        f, a = self._hit()
        stream = self._stream(tmp_path, [f], [a])
        code, _, _, err = _run(["bumptest", str(stream), "--force-point", "hammer",
                                "--force-range", "250"])
        assert code == 1 and "at or beyond the stated range of 250 N (overload)" in err
        code, _, _, err = _run(["bumptest", str(stream), "--force-point", "hammer",
                                "--force-range", "-1"])
        assert code == 2 and "--force-range" in err

    def test_double_hit_left_out_with_a_warning(self, tmp_path: Path) -> None:
        t = np.arange(4096) / self.FS
        forces, accs = [], []
        for k in range(3):
            f = half_sine(t, 0.01, 0.003, 300.0)
            if k == 1:
                f = f + half_sine(t, 0.025, 0.003, 120.0)  # a rebound 15 ms later
            forces.append(f)
            accs.append(sdof_acceleration(f, self.FS, self.FN, self.ZETA, self.MASS))
        stream = self._stream(tmp_path, forces, accs)
        code, docs, _, err = _run(["bumptest", str(stream), "--force-point", "hammer", "--json",
                                   "--band", "10", "200"])
        assert code == 0, err
        (doc,) = docs
        assert doc["hits"] == 2 and [h["accepted"] for h in doc["hit_checks"]] == [True, False, True]
        assert doc["hit_checks"][1]["problems"][0]["kind"] == "double_hit"
        assert "warning: bump.jsonl: force channel tb-1/hammer, hit at 2026-03-02T06:00:30Z:" in err
        assert "(double hit)" in err
        (m,) = doc["modes"]
        # accelerance peak within zeta^2 of fn (Thomson)
        assert m["frequency_hz"] == pytest.approx(self.FN, rel=1e-3)
