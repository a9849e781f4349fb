"""Checks of the physics-based simulator against textbook results."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import signal

from monitor.model.bearing_geometry import BearingGeometry
from monitor.model.readings import SpeedReading, Waveform
from monitor.sim.faults import SensorFault, apply_sensor_fault, grown_unbalance
from monitor.sim.sdof import sdof_response
from monitor.sim.simulate import (
    BearingDefect,
    MachineModel,
    ModalMode,
    once_per_rev_times,
    point_inertance,
    simulate_reading,
    simulate_run,
    simulate_signal,
)
from monitor.sim.speed_profile import SpeedProfile


def _fit(x: np.ndarray, f_hz: float, fs_hz: float, t0_s: float = 0.0) -> tuple[float, float]:
    """Least-squares amplitude and phase lag (deg) of A cos(2 pi f (t0 + t) - lag)."""
    t = t0_s + np.arange(x.size) / fs_hz
    basis = np.c_[np.cos(2 * np.pi * f_hz * t), np.sin(2 * np.pi * f_hz * t)]
    (c, s), *_ = np.linalg.lstsq(basis, x, rcond=None)
    return math.hypot(c, s), math.degrees(math.atan2(s, c))


def _textbook(r: float, zeta: float) -> tuple[float, float]:
    # W. T. Thomson, Theory of Vibration with Applications, forced harmonic vibration:
    # X k / F0 = 1/sqrt((1-r^2)^2 + (2 zeta r)^2), phase = atan2(2 zeta r, 1 - r^2)
    return (
        1.0 / math.sqrt((1 - r * r) ** 2 + (2 * zeta * r) ** 2),
        math.degrees(math.atan2(2 * zeta * r, 1 - r * r)),
    )


class TestSdofResponse:
    fs = 2000.0
    fn = 20.0

    @pytest.mark.parametrize("zeta", [0.02, 0.05, 0.1, 0.3])
    @pytest.mark.parametrize("r", [0.5, 0.9, 1.0, 1.1, 2.0])
    def test_steady_state_matches_magnification_factor(self, r: float, zeta: float) -> None:
        wn = 2 * math.pi * self.fn
        f = r * self.fn
        # run 10 time constants 1/(zeta wn) so the start transient is below 1e-4
        n_settle = int(10 / (zeta * wn) * self.fs)
        n_fit = int(round(20 / f * self.fs))  # 20 whole periods
        t = np.arange(n_settle + n_fit) / self.fs
        u = wn**2 * np.cos(2 * np.pi * f * t)  # static deflection u0/wn^2 = 1
        x = sdof_response(u, self.fs, self.fn, zeta)[n_settle:]
        amp, lag = _fit(x, f, self.fs, t0_s=n_settle / self.fs)
        h, phase = _textbook(r, zeta)
        # tolerance: 2 % / 2 deg, engineering choice for the discrete-time integration at
        # fs = 100 fn (the scipy lsim check below is the tight one)
        assert amp == pytest.approx(h, rel=0.02)
        assert (lag - phase + 180) % 360 - 180 == pytest.approx(0.0, abs=2.0)

    def test_reference_values(self) -> None:
        # W. T. Thomson, Theory of Vibration with Applications, SDOF frequency response (computed): zeta=0.05 -> H(1)=10;
        # zeta=0.1, r=2 -> phase 172.405 deg
        assert _textbook(1.0, 0.05)[0] == pytest.approx(10.0)
        assert _textbook(2.0, 0.1)[1] == pytest.approx(172.405, abs=1e-3)

    def test_agrees_with_scipy_lsim(self) -> None:
        # scipy.signal.lsim as an independent integrator of the same equation
        zeta, fs = 0.05, 1000.0
        t = np.arange(2000) / fs
        u = np.sin(2 * np.pi * 7 * t) * np.exp(-t)
        wn = 2 * math.pi * 15
        _, y, _ = signal.lsim(([1.0], [1.0, 2 * zeta * wn, wn * wn]), u, t)
        x = sdof_response(u, fs, 15.0, zeta)
        assert np.max(np.abs(x - y)) < 1e-3 * np.max(np.abs(y))

    def test_bad_damping(self) -> None:
        with pytest.raises(ValueError, match="damping_ratio"):
            sdof_response(np.zeros(10), 1000.0, 10.0, 1.5)


def _one_mode(fn: float, zeta: float, mass: float, unbalance: float) -> MachineModel:
    return MachineModel(
        machine_id="m",
        modes=(ModalMode(frequency_hz=fn, damping_ratio=zeta, modal_mass_kg=mass),),
        rigid_mass_kg=None,
        unbalance_kg_m=unbalance,
    )


class TestUnbalance:
    def test_one_x_follows_rotating_unbalance_law(self) -> None:
        # Thomson, rotating unbalance: M X / (m e) = r^2 / sqrt((1-r^2)^2 + (2 zeta r)^2);
        # the measured acceleration is Omega^2 X.
        fn, zeta, mass, me, fs = 20.0, 0.05, 200.0, 0.01, 2000.0
        model = _one_mode(fn, zeta, mass, me)
        for r in (0.5, 0.95, 1.0, 1.5, 3.0):
            f = r * fn
            w = simulate_reading(model, "p", speed_hz=f, ts=0.0, fs_hz=fs, n_samples=4000)
            amp, _ = _fit(w.samples, f, fs)
            omega = 2 * math.pi * f
            h, _ = _textbook(r, zeta)
            expected = omega**2 * (me / mass) * r * r * h
            assert amp == pytest.approx(expected, rel=0.02), r

    def test_one_x_grows_with_speed_squared_on_the_mass_line(self) -> None:
        # far above the mount mode a free mass gives a = F/M = m e Omega^2 / M (Newton)
        model = MachineModel("m", rigid_mass_kg=400.0, mount_frequency_hz=2.0, unbalance_kg_m=0.004)
        fs = 2560.0
        amps = []
        for f in (20.0, 40.0):
            w = simulate_reading(model, "p", speed_hz=f, ts=0.0, fs_hz=fs, n_samples=4096)
            amps.append(_fit(w.samples, f, fs)[0])
            r = f / 2.0
            h = _textbook(r, 0.2)[0]
            assert amps[-1] == pytest.approx(0.004 * (2 * math.pi * f) ** 2 / 400 * r * r * h, rel=0.02)
        # Newton: a ~ Omega^2, so doubling the speed quadruples the 1x; tolerance: 3 % covers
        # the mount mode's residual r^2 H(r) (1.0093 at r = 10, 1.0023 at r = 20, textbook
        # SDOF, zeta 0.2: ratio 3.97) plus the fit
        assert amps[1] / amps[0] == pytest.approx(4.0, rel=0.03)

    def test_point_inertance_matches_scipy_freqs(self) -> None:
        # scipy.signal.freqs of the SDOF acceleration transfer (s^2/m) / (s^2 + 2 zeta wn s + wn^2)
        model = _one_mode(20.0, 0.05, 200.0, 0.0)
        f = np.array([5.0, 19.0, 20.0, 40.0])
        wn = 2 * math.pi * 20.0
        _, h = signal.freqs([1 / 200.0, 0, 0], [1, 2 * 0.05 * wn, wn * wn], worN=2 * np.pi * f)
        assert np.allclose(point_inertance(model, "p", f), h, rtol=1e-9)

    def test_growth(self) -> None:
        # definition: doubling every 5 days over 10 days is x 2^2 = 4; a linear rate of
        # 0.5 per day over 10 days adds 5
        assert grown_unbalance(1.0, 10.0, doubling_days=5.0) == pytest.approx(4.0)
        assert grown_unbalance(1.0, 10.0, rate_kg_m_per_day=0.5) == pytest.approx(6.0)
        with pytest.raises(ValueError, match="exactly one"):
            grown_unbalance(1.0, 1.0)


class TestBearingDefect:
    # CWRU drive-end bearing geometry (open data set); BPFO = 3.5848 x shaft speed
    # (Randall and Antoni 2011 formula; multiples published with the Case Western Reserve
    # University bearing data set)
    geometry = BearingGeometry(n_elements=9, ball_diameter=0.3126, pitch_diameter=1.537)

    def test_defect_orders_from_geometry(self) -> None:
        assert self.geometry.bpfo_order == pytest.approx(3.5848, abs=1e-4)
        assert self.geometry.bpfi_order == pytest.approx(5.4152, abs=1e-4)
        assert self.geometry.ftf_order == pytest.approx(0.39828, abs=1e-4)
        assert 2 * self.geometry.bsf_order == pytest.approx(4.7135, abs=1e-4)

    def test_impact_period_is_bpfo(self) -> None:
        fs, shaft = 8192.0, 29.95
        model = MachineModel(
            "b",
            rigid_mass_kg=None,
            bearing=BearingDefect(
                order=self.geometry.bpfo_order, impact_peak_m_s2=20.0,
                resonance_hz=2500.0, resonance_damping=0.05, slip_pct=0.0,
            ),
        )
        x = simulate_signal(model, "p", np.full(int(4 * fs), shaft), fs)
        # envelope spectrum (scipy Hilbert transform), the usual bearing diagnosis
        env = np.abs(signal.hilbert(x))
        spec = np.abs(np.fft.rfft((env - env.mean()) * np.hanning(env.size)))
        freq = np.fft.rfftfreq(env.size, 1 / fs)
        band = (freq > 50) & (freq < 150)
        peak = freq[band][np.argmax(spec[band])]
        assert peak == pytest.approx(3.5848 * shaft, abs=0.3)  # 0.25 Hz bins
        # the impacts ring the resonance: the strongest line is the BPFO harmonic nearest it
        full = np.abs(np.fft.rfft(x * np.hanning(x.size)))
        # analytic: 2500 Hz is the resonance set in the model; the strongest line is the BPFO
        # harmonic nearest it, so within half the BPFO spacing (3.5848 x shaft / 2, CWRU
        # multiple published with the CWRU bearing data set) plus 0.5 Hz (two 0.25 Hz bins)
        assert freq[np.argmax(full)] == pytest.approx(2500.0, abs=3.5848 * shaft / 2 + 0.5)


class TestDeterminismAndRuns:
    model = MachineModel(
        "fan",
        modes=(ModalMode(15.0, 0.03, 150.0),),
        unbalance_kg_m=0.005,
        misalignment_n=30.0,
        pass_orders=(8.0,),
        pass_force_n=10.0,
        force_noise_n=5.0,
        sensor_noise_m_s2=0.01,
    )

    def test_same_seed_same_samples(self) -> None:
        a = simulate_reading(self.model, "p", speed_hz=14.0, ts=1.0, fs_hz=2560, n_samples=2048, seed=7)
        b = simulate_reading(self.model, "p", speed_hz=14.0, ts=1.0, fs_hz=2560, n_samples=2048, seed=7)
        c = simulate_reading(self.model, "p", speed_hz=14.0, ts=1.0, fs_hz=2560, n_samples=2048, seed=8)
        assert np.array_equal(a.samples, b.samples)
        assert not np.array_equal(a.samples, c.samples)

    def test_run_up_passes_resonance_with_peak_and_lag(self) -> None:
        # slow run-up through a zeta=0.03 mode: the 1x response peaks near the natural
        # frequency (Thomson: H_max at r = sqrt(1-2 zeta^2)), phase lag passes 90 deg
        model = _one_mode(15.0, 0.03, 150.0, 0.005)
        fs = 1024.0
        profile = SpeedProfile.run_up(25.0, 120.0, start_hz=5.0)
        out = simulate_run(model, profile, points=["p"], fs_hz=fs, block_samples=1024,
                           interval_s=2.0, start_ts=0.0, warmup_s=0.0)
        speeds = [r.speed_hz for r in out if isinstance(r, SpeedReading)]
        waves = [r for r in out if isinstance(r, Waveform)]
        assert len(speeds) == len(waves) > 50
        amp_per_u = []
        for s, w in zip(speeds, waves, strict=True):
            a, _ = _fit(w.samples, s, fs)  # speed nearly constant over 1 s
            amp_per_u.append(a / (2 * math.pi * s) ** 2)  # divide out the Omega^2 force
        peak_speed = speeds[int(np.argmax(amp_per_u))]
        # tolerance: 4 %, engineering choice: the speed steps about 0.33 Hz (2 %) between
        # 2 s readings, and the textbook peak (r = sqrt(1 - 2 zeta^2) = 0.9991) is 0.1 % below fn
        assert peak_speed == pytest.approx(15.0, rel=0.04)

    def test_once_per_rev_pulses_follow_the_shaft_angle(self) -> None:
        # kinematics: the shaft angle is the integral of speed, so on a linear ramp
        # f(t) = f0 + a t the n-th pulse comes at f0 t + a t^2 / 2 = n (whole turns)
        fs, f0, a = 2560.0, 10.0, 0.5
        t = np.arange(int(20 * fs)) / fs
        pulses = once_per_rev_times(f0 + a * t, fs)
        n = np.arange(1, pulses.size + 1)
        exact = (-f0 + np.sqrt(f0 * f0 + 2 * a * n)) / a
        # 300 turns in 20 s; the 300th falls at 20 s, just past the last sample
        assert pulses.size == int(f0 * 20 + a * 400 / 2) - 1
        # within a thousandth of a sample (the trapezoid integral is exact for a ramp;
        # the crossing is interpolated linearly within one sample)
        assert np.max(np.abs(pulses - exact)) < 1e-3 / fs
        # after a warm-up at the first speed the angle goes on from where it was
        warm = once_per_rev_times(np.full(2560, 25.0), fs, warmup_samples=100)
        assert warm[0] == pytest.approx((1 - (25.0 * 100 / fs) % 1) / 25.0, abs=1e-9)
        assert np.allclose(np.diff(warm), 1 / 25.0)

    def test_run_blocks_carry_their_pulses_only_when_asked(self) -> None:
        model = _one_mode(15.0, 0.03, 150.0, 0.005)
        prof = SpeedProfile.run_up(25.0, 20.0, start_hz=5.0)
        kw = dict(points=["p"], fs_hz=1024.0, block_samples=1024, interval_s=2.0, start_ts=0.0,
                  warmup_s=0.0)
        plain = [r for r in simulate_run(model, prof, **kw) if isinstance(r, Waveform)]
        keyed = [r for r in simulate_run(model, prof, **kw, once_per_rev=True) if isinstance(r, Waveform)]
        assert all(w.once_per_rev_s is None for w in plain)
        for w, k in zip(plain, keyed, strict=True):
            assert np.array_equal(w.samples, k.samples)  # the pulses change no sample
            assert k.once_per_rev_s is not None and k.once_per_rev_s.size >= 5
            # speed from the pulse spacing (one turn per pulse) within the block's range
            # (kinematics: 5 + t Hz)
            f = 1.0 / np.diff(k.once_per_rev_s)
            assert np.all((f > 5.0 + k.ts - 0.1) & (f < 5.0 + k.ts + 1.1))

    def test_profiles(self) -> None:
        steps = SpeedProfile.steps([10.0, 20.0], dwell_s=5.0, ramp_hz_per_s=2.0)
        # definition: dwell 5 s + ramp (20 - 10) / 2 = 5 s + dwell 5 s = 15 s; mid-ramp at
        # 7.5 s is halfway, 15 Hz
        assert steps.duration_s == pytest.approx(15.0)
        assert float(steps.speed_at(7.5)) == pytest.approx(15.0)
        cd = SpeedProfile.coast_down(25.0, 60.0)
        assert cd.speeds_hz[0] == pytest.approx(25.0) and cd.speeds_hz[-1] == 0.0
        assert np.all(np.diff(cd.speeds_hz) <= 0)


class TestSensorFaults:
    x = np.sin(np.linspace(0, 20 * np.pi, 1000))

    def test_flat_line(self) -> None:
        y = apply_sensor_fault(self.x, SensorFault("flat_line", level=0.0, start_fraction=0.5))
        assert np.all(y[500:] == 0.0) and np.array_equal(y[:500], self.x[:500])

    def test_clipping(self) -> None:
        y = apply_sensor_fault(self.x, SensorFault("clipping", level=0.5))
        assert y.max() == 0.5 and y.min() == -0.5  # definition: clipped at the set level

    def test_spikes_and_dropouts(self) -> None:
        y = apply_sensor_fault(self.x, SensorFault("spikes", level=50.0, count=3))
        assert np.sum(np.abs(y) > 40) == 3  # the 3 requested spikes of 50, signal within +-1
        z = apply_sensor_fault(self.x, SensorFault("dropout", count=1, gap_fraction=0.1))
        assert np.sum(z == 0.0) >= 100  # a gap of 0.1 x 1000 samples set to zero
