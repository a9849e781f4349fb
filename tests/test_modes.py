"""Mode identification (monitor.modes) and the ``bumptest`` / ``passage`` commands.
The impact test's frequency response, its checks of each hit and its refusals are in
tests/test_modes_impact.py.

Every expected value comes from a textbook formula, a worked example, API 684's rule or
scipy as an independent reference; the signals are closed-form responses, scipy's own
integrators (``solve_ivp``, ``lsim``) or the project's simulator driven through a mode
whose parameters fix the answer.
"""

from __future__ import annotations

import json
import math
import re
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from contracts import check_alarm_event
from scipy import integrate, optimize, signal
from scipy.constants import g as G_SI
from scipy.constants import inch

from monitor.cli import main
from monitor.io.streams import reading_message, write_stream
from monitor.model.readings import SpeedReading, Waveform
from monitor.model.registry import Machine, Mode, Point, Registry
from monitor.model.registry_file import dump_registry
from monitor.modes.damping import damping_from_decrement, decay_decrement, decrement_from_amplitudes
from monitor.modes.runup import BodeData, bode_data, find_passages, order_point
from monitor.modes.shift import compare_modes, mode_shift
from monitor.modes.skip_bands import skip_bands
from monitor.sim.simulate import MachineModel, ModalMode, simulate_run, simulate_signal
from monitor.sim.speed_profile import SpeedProfile

T0 = 1772431200.0  # 2026-03-02T06:00:00Z


# ----------------------------------------------------------------------------- decrement


class TestLogDecrement:
    # Thomson, Theory of Vibration with Applications, Example 2.7-1: W = 10 lb,
    # k = 30 lb/in, c = 0.12 lb s/in. Published: omega_n = 34.0 rad/s, zeta = 0.0681,
    # delta = 0.429; recomputed from the example's data: 34.029, 0.068059, 0.42862,
    # x1/x2 = 1.5351.
    W, K, C = 10.0, 30.0, 0.12
    GRAV = G_SI / inch  # in/s^2

    def _free_decay(self, fs: float = 1000.0, seconds: float = 4.0) -> np.ndarray:
        m = self.W / self.GRAV

        def rhs(_t: float, y: np.ndarray) -> list[float]:
            return [y[1], -(self.C * y[1] + self.K * y[0]) / m]

        t = np.arange(int(seconds * fs)) / fs
        sol = integrate.solve_ivp(rhs, (0, t[-1]), [1.0, 0.0], t_eval=t, rtol=1e-11,
                                  atol=1e-13, method="DOP853")
        return sol.y[0]

    def test_thomson_example_2_7_1_formulas(self) -> None:
        m = self.W / self.GRAV
        wn = math.sqrt(self.K / m)
        zeta = self.C / (2 * math.sqrt(self.K * m))
        delta = 2 * math.pi * zeta / math.sqrt(1 - zeta**2)
        # Thomson Example 2.7-1, printed to 3 figures
        assert wn == pytest.approx(34.0, abs=0.05)
        assert zeta == pytest.approx(0.0681, abs=5e-5)
        assert delta == pytest.approx(0.429, abs=5e-4)
        # the inverse relation used by the module: zeta = delta / sqrt(4 pi^2 + delta^2)
        assert damping_from_decrement(delta) == pytest.approx(zeta, rel=1e-12)

    def test_decay_of_thomson_system(self) -> None:
        fs = 1000.0
        x = self._free_decay(fs)
        # values recomputed from Example 2.7-1's data (g = 386 in/s^2; 386.09 moves them < 2e-4)
        # raw record: 0.2 %; band-passed: 1.5 % (the filter trims the skirts of a mode
        # this heavily damped, 7 cycles down to 5 %)
        for filt, rel in ((False, 2e-3), (True, 1.5e-2)):
            fit = decay_decrement(x, fs, 34.029 / (2 * math.pi), filter_band=filt)
            assert fit is not None
            assert fit.log_decrement == pytest.approx(0.42862, rel=rel)
            assert fit.damping_ratio == pytest.approx(0.068059, rel=rel)
            assert math.exp(fit.log_decrement) == pytest.approx(1.5351, rel=rel)  # x1/x2
            assert fit.cycles >= 5

    def test_thomson_example_2_7_2_over_n_cycles(self) -> None:
        # Thomson Example 2.7-2: delta = ln(x0 / xn) / n; peaks of the solved decay n
        # cycles apart give the same decrement as adjacent ones.
        fs = 20000.0
        x = self._free_decay(fs, 2.0)
        pk, _ = signal.find_peaks(x)
        amps = x[pk]
        d1 = decrement_from_amplitudes(amps[0], amps[1], 1)
        d5 = decrement_from_amplitudes(amps[0], amps[5], 5)
        assert d1 == pytest.approx(0.42862, rel=1e-3)
        assert d5 == pytest.approx(0.42862, rel=1e-3)
        # and by construction of the definition: x_n = x_0 exp(-n delta)
        assert decrement_from_amplitudes(2.0, 2.0 * math.exp(-3 * 0.4), 3) == (
            pytest.approx(0.4, rel=1e-12))

    @pytest.mark.parametrize("bad", [
        dict(x0=0.0, xn=1.0, cycles=1), dict(x0=1.0, xn=-1.0, cycles=1),
        dict(x0=1.0, xn=0.5, cycles=0), dict(x0=math.nan, xn=0.5, cycles=1),
    ])
    def test_bad_amplitudes(self, bad: dict) -> None:
        with pytest.raises(ValueError, match="x0|xn|cycles"):
            decrement_from_amplitudes(**bad)


# ----------------------------------------------------------------------------- run-up


def _unbalance_af(zeta: float) -> float:
    """AF (API 684 half-power definition) of the rotating-unbalance response
    X ~ r^2 / sqrt((1 - r^2)^2 + (2 zeta r)^2) (Thomson, rotating unbalance), its peak at
    r = 1 / sqrt(1 - 2 zeta^2) and the 0.707 points found by root finding."""
    def amp(r: float) -> float:
        return r * r / math.sqrt((1 - r * r) ** 2 + (2 * zeta * r) ** 2)
    rp = 1 / math.sqrt(1 - 2 * zeta**2)
    level = amp(rp) / math.sqrt(2)
    r1 = optimize.brentq(lambda r: amp(r) - level, 0.5, rp)
    r2 = optimize.brentq(lambda r: amp(r) - level, rp, 2.0)
    return rp / (r2 - r1)


class TestRunUp:
    FS, FN, ZETA = 512.0, 20.0, 0.02
    S0, S1, T = 14.0, 26.0, 240.0  # slow sweep: 0.05 Hz/s, 1.25 half-power bands / 10 s

    def _bode(self) -> BodeData:
        model = MachineModel("rig", modes=(ModalMode(self.FN, self.ZETA, 100.0),),
                             rigid_mass_kg=None, unbalance_kg_m=1e-3)
        t = np.arange(int(self.T * self.FS) + 1) / self.FS
        speed = SpeedProfile.ramp(self.S0, self.S1, self.T).speed_at(t)
        # 5 s warm-up at 14 Hz = 70 whole revolutions: the shaft angle is 0 at t = 0
        x = simulate_signal(model, "p", speed, self.FS, unit="um", warmup_s=5.0)
        a = (self.S1 - self.S0) / self.T
        k = np.arange(int(self.S0 * self.T + a * self.T**2 / 2))
        pulses = (-self.S0 + np.sqrt(self.S0**2 + 2 * a * k)) / a  # s0 t + a t^2 / 2 = k
        blk = int(2 * self.FS)
        s, amp, ph = [], [], []
        for i0 in range(0, t.size - blk, int(self.FS)):
            mid = t[i0] + 1.0
            ref = pulses[np.argmin(np.abs(pulses - mid))] - t[i0]
            v, p = order_point(x[i0:i0 + blk], self.FS, "um", self.S0 + a * mid,
                                     reference_s=ref)
            s.append(self.S0 + a * mid)
            amp.append(v)
            ph.append(p)
        return bode_data(s, amp, ph, unit="um")

    def test_passage_through_simulated_mode(self) -> None:
        bode = self._bode()
        assert bode.direction == "run-up"
        (p,) = find_passages(bode)
        step = float(np.median(np.diff(bode.speed_hz)))  # 0.05 Hz between Bode points
        # rotating unbalance peaks at r = 1 / sqrt(1 - 2 zeta^2) (Thomson)
        assert p.critical_speed_hz == pytest.approx(self.FN / math.sqrt(1 - 2 * self.ZETA**2),
                                                    abs=step)
        # phase lag through 90 deg at resonance (Thomson: phi = 90 deg at r = 1;
        # atan2(2 zeta r, 1 - r^2) = 91.1 deg at the unbalance peak); 5 deg for the sweep
        assert p.phase_at_peak_deg == pytest.approx(90.0, abs=5.0)
        assert p.phase_change_deg == pytest.approx(90.0, abs=5.0)
        # API 684 AF = Nc / (N2 - N1): against the closed-form curve 2 %, and against
        # the light-damping 1 / (2 zeta) 5 %
        assert p.amplification_factor == pytest.approx(_unbalance_af(self.ZETA), rel=0.02)
        assert p.amplification_factor == pytest.approx(1 / (2 * self.ZETA), rel=0.05)
        assert p.frequency_hz == p.critical_speed_hz  # 1x

    def test_coast_down_order_and_json(self) -> None:
        bode = self._bode()
        rev = bode_data(bode.speed_hz[::-1], bode.amplitude[::-1],
                              bode.phase_deg[::-1], unit="um")
        assert rev.direction == "coast-down"
        (p,) = find_passages(rev)
        (q,) = find_passages(bode)
        # definition: the same points in reverse order give the same passage
        assert p.critical_speed_hz == pytest.approx(q.critical_speed_hz, rel=1e-12)
        doc = json.loads(json.dumps(rev.to_json()))
        assert set(doc) == {"order", "unit", "direction", "speed_hz", "speed_rpm",
                            "amplitude", "phase_deg"}
        assert doc["speed_rpm"][0] == pytest.approx(60 * doc["speed_hz"][0])  # 1 Hz = 60 r/min

    def test_bad_bode_input(self) -> None:
        with pytest.raises(ValueError, match="speed_hz and amplitude"):
            bode_data([1, 2, 3, 4, 5], [1, 2, 3])
        with pytest.raises(ValueError, match="amplitude"):
            bode_data([1, 2, 3, 4, 5], [1, 2, -3, 4, 5])
        with pytest.raises(ValueError, match="phase_deg"):
            bode_data([1, 2, 3, 4, 5], [1, 2, 3, 4, 5], [0, 1])
        with pytest.raises(ValueError, match="prominence"):
            find_passages(bode_data([1, 2, 3, 4, 5], [1, 2, 3, 2, 1]), prominence=2)


# ----------------------------------------------------------------------------- mode shift


class TestModeShift:
    MODE = Mode("structure lateral", 18.4, damping_ratio=0.03)

    def test_shift_beyond_tolerance(self) -> None:
        s = mode_shift(self.MODE, 17.3)
        # (17.3 - 18.4) / 18.4 = -5.978 % (hand computed) > 5 % (common practice)
        assert s.shift_pct == pytest.approx(-5.978261, rel=1e-6)
        assert s.exceeded and s.status == "shifted" and s.kind == "mode_shift"
        assert not mode_shift(self.MODE, 18.0).exceeded  # -2.17 %
        assert mode_shift(self.MODE, 18.0, tolerance_pct=2.0).exceeded

    def test_compare_assigns_each_peak_once(self) -> None:
        stored = (Mode("a", 10.0), Mode("b", 11.0), Mode("c", 40.0))
        out = compare_modes(stored, [10.9, 10.2])
        # definition: each stored mode takes the nearest unused peak; (10.2 - 10) / 10 = 2 %
        assert [o.identified_hz for o in out] == [10.2, 10.9, None]
        assert [o.status for o in out] == ["unchanged", "unchanged", "not_found"]
        assert out[0].shift_pct == pytest.approx(2.0)

    @pytest.mark.parametrize("tol", [0.0, -1.0, 100.0, math.nan])
    def test_bad_tolerance(self, tol: float) -> None:
        with pytest.raises(ValueError, match="tolerance_pct"):
            mode_shift(self.MODE, 18.0, tolerance_pct=tol)


# ----------------------------------------------------------------------------- skip bands


class TestSkipBands:
    def test_hand_computed_api684(self) -> None:
        # API 684 separation margin rule: AF 10 -> 15 % (mode below) / 25 % (mode above).
        # 20 Hz mode: excitation band [20 x 0.75, 20 x 1.15] = [15, 23] Hz
        # -> 1x: 900-1380 r/min, 2x: 450-690 r/min; clipped to 600-1500 r/min.
        a = Mode("a", 20.0, amplification_factor=10.0)
        bands = skip_bands([a], [1, 2], (600.0, 1500.0))
        assert [(b.low_rpm, b.high_rpm) for b in bands] == [
            (pytest.approx(600.0), pytest.approx(690.0)),
            (pytest.approx(900.0), pytest.approx(1380.0)),
        ]
        assert bands[1].causes == ("a@1x",)

    def test_overlaps_merge(self) -> None:
        # second mode 25 Hz, AF 5: 17 (1 - 1/3.5) = 12.143 % below, 22.143 % above
        # (API 684 separation margin rule) -> [19.464, 28.036] Hz
        # 1x: 1167.9-1682.1 r/min merges with 900-1380 and is clipped at 1500;
        # 2x: 583.9-841.1 r/min merges with 600-690.
        a = Mode("a", 20.0, amplification_factor=10.0)
        b = Mode("b", 25.0, amplification_factor=5.0)
        bands = skip_bands([a, b], [1, 2], (600.0, 1500.0))
        hi_2x = 60 * 25 * (1 + 17 * (1 - 1 / 3.5) / 100) / 2
        assert [(x.low_rpm, x.high_rpm) for x in bands] == [
            (pytest.approx(600.0), pytest.approx(hi_2x)),
            (pytest.approx(900.0), pytest.approx(1500.0)),
        ]
        assert set(bands[1].causes) == {"a@1x", "b@1x"}

    def test_damped_mode_and_configured_margin(self) -> None:
        # API 684: AF < 2.5 needs no margin; a configured 10 % is used on both sides
        damped = Mode("d", 20.0, amplification_factor=2.0)
        assert skip_bands([damped], [1], (0, 3000)) == ()
        conf = Mode("c", 20.0, required_margin_pct=10.0)
        (band,) = skip_bands([conf], [1], (0, 3000))
        # 20 Hz +- 10 % = 18-22 Hz = 1080-1320 r/min (1 Hz = 60 r/min)
        assert (band.low_rpm, band.high_rpm) == (pytest.approx(1080.0), pytest.approx(1320.0))

    def test_bad_range(self) -> None:
        with pytest.raises(ValueError, match="speed_range_rpm"):
            skip_bands([Mode("a", 20.0)], [1], (1500.0, 600.0))
        with pytest.raises(ValueError, match="excitation_orders"):
            skip_bands([Mode("a", 20.0)], [0], (600.0, 1500.0))


# ----------------------------------------------------------------------------- CLI


def _run(args: list[str]) -> tuple[int, list[dict], str, str]:
    result = CliRunner().invoke(main, args)
    lines = [json.loads(x) for x in result.stdout.splitlines() if x.startswith("{")]
    return result.exit_code, lines, result.stdout, result.stderr


class TestBumptestCommand:
    FS, FN, ZETA = 2048.0, 42.0, 0.02

    def _stream(self, tmp_path: Path, *, force: bool) -> Path:
        wn = 2 * math.pi * self.FN
        n = 4096  # 2 s: 21 time constants
        t = np.arange(n) / self.FS
        # accelerance of a 5 kg SDOF: s^2 / (m (s^2 + 2 zeta wn s + wn^2))
        sys = signal.lti([1 / 5.0, 0, 0], [1, 2 * self.ZETA * wn, wn * wn])
        msgs = []
        for k in range(3):
            f = np.zeros(n)
            on = (t >= 0.01) & (t < 0.013)
            f[on] = (80.0 + 10 * k) * np.sin(np.pi * (t[on] - 0.01) / 0.003)
            _, y, _ = signal.lsim(sys, f, t)
            ts = T0 + 30.0 * k
            msgs.append(reading_message(Waveform("tb-1", "top-h", ts, self.FS, "m/s^2", y)))
            if force:
                msgs.append(reading_message(Waveform("tb-1", "hammer", ts, self.FS, "N", f)))
        path = tmp_path / "bump.jsonl"
        write_stream(path, msgs)
        return path

    def test_json_with_hammer_and_registry(self, tmp_path: Path) -> None:
        stream = self._stream(tmp_path, force=True)
        reg = tmp_path / "m.toml"
        stored = Mode("frame", 46.0, damping_ratio=0.02, source="impact test")
        reg.write_text(dump_registry(Registry((Machine(
            id="tb-1", points=(Point("top-h", "horizontal", "acceleration", "m/s^2"),),
            modes=(stored,)),))))
        code, docs, _, err = _run(["bumptest", str(stream), "--machines", str(reg),
                                   "--force-point", "hammer", "--json", "--band", "10", "200"])
        assert code == 0, err
        (doc,) = docs
        assert doc["kind"] == "H1" and doc["hits"] == 3 and doc["unit"] == "m/s^2/N"
        (m,) = doc["modes"]
        # accelerance peak at r = 1 / sqrt(1 - 2 zeta^2), within 1e-3 of f_n (Thomson)
        assert m["frequency_hz"] == pytest.approx(self.FN, rel=1e-3)
        # analytic: ZETA of the simulated system; tolerance: 2 %, engineering choice for
        # three hits of a sampled response
        assert m["damping_ratio_half_power"] == pytest.approx(self.ZETA, rel=0.02)
        assert m["damping_ratio_decrement"] == pytest.approx(self.ZETA, rel=0.02)
        assert m["fit"]["damping_ratio"] == pytest.approx(self.ZETA, rel=0.02)
        # API 684: AF ~ 25 -> capped margins 16 % / 26 %
        assert m["required_margin_pct"] == {"below": 16.0, "above": 26.0}
        (c,) = doc["comparison"]
        # (42 - 46) / 46 = -8.7 %: beyond the 5 % tolerance
        assert c["status"] == "shifted" and c["shift_pct"] == pytest.approx(-8.696, abs=0.05)

    def test_record_raises_then_clears_a_mode_shift_alarm(self, tmp_path: Path, database_url: str) -> None:
        from sqlalchemy import select

        from monitor.detection.evaluator import MachineEvaluator
        from monitor.store import Store, upgrade
        from monitor.store.models import Alarm, AlarmTransitionRow, DetectorState

        stream = self._stream(tmp_path, force=True)
        upgrade(database_url)

        def registry_with(frequency_hz: float) -> Path:
            reg = tmp_path / "m.toml"
            reg.write_text(dump_registry(Registry((Machine(
                id="tb-1", points=(Point("top-h", "horizontal", "acceleration", "m/s^2"),),
                modes=(Mode("frame", frequency_hz, damping_ratio=0.02, source="impact test"),)),))))
            return reg

        def bump() -> dict:
            code, docs, _, err = _run(["bumptest", str(stream), "--record", "--database", database_url,
                                       "--force-point", "hammer", "--json", "--band", "10", "200"])
            assert code == 0, err
            (doc,) = docs
            return doc

        assert _run(["machines", "import", str(registry_with(46.0)), "--database", database_url])[0] == 0
        # The simulated 42 Hz mode against the stored 46 Hz: -8.7 % is beyond the 5 %
        # tolerance (common practice) but within twice it, so an advisory alarm is raised.
        doc = bump()
        (t,) = doc["alarm_transitions"]
        check_alarm_event(t)  # the MQTT alarm-event shape (docs/alarms.md, "Transition and alarm JSON")
        assert (t["kind"], t["subject"], t["point"], t["transition"], t["severity"]) == (
            "mode_shift", "frame", "top-h", "raised", "advisory")
        assert t["evidence"]["identified_hz"] == pytest.approx(self.FN, rel=1e-3)
        # The same test again changes nothing: the alarm is open at the same level.
        assert bump()["alarm_transitions"] == []
        # The registry corrected to the measured frequency: the next test clears the alarm.
        assert _run(["machines", "import", str(registry_with(42.0)), "--database", database_url])[0] == 0
        (t,) = bump()["alarm_transitions"]
        check_alarm_event(t)
        assert t["transition"] == "cleared" and t["state"] == "cleared"
        store = Store.open(database_url)
        try:
            with store.session() as s:
                names = s.execute(select(AlarmTransitionRow.transition).join(Alarm).where(
                    Alarm.kind == "mode_shift").order_by(AlarmTransitionRow.id)).scalars().all()
                state = s.execute(select(DetectorState.state).where(DetectorState.machine_id == "tb-1")).scalar_one()
        finally:
            store.close()
        assert names == ["raised", "cleared"]
        # The stored detector state (what the service reloads) holds the alarm's history.
        assert state["version"] == 2
        ev = MachineEvaluator.restore(
            Machine(id="tb-1", points=(Point("top-h", "horizontal", "acceleration", "m/s^2"),),
                    modes=(Mode("frame", 42.0, damping_ratio=0.02),)), state["evaluator"])
        (key,) = ev.engine.alarm_keys()
        assert ev.engine.alarm(key).state == "cleared"
        # The table form names each recorded transition; a new shift is a new alarm.
        assert _run(["machines", "import", str(registry_with(46.0)), "--database", database_url])[0] == 0
        code, _, out, err = _run(["bumptest", str(stream), "--record", "--database", database_url,
                                  "--force-point", "hammer", "--band", "10", "200"])
        assert code == 0, err
        assert re.search(r"recorded: mode_shift alarm \d+ \(tb-1/top-h/mode_shift/frame#2\) raised \(advisory\)", out)

    def test_record_needs_the_database_registry(self, tmp_path: Path) -> None:
        stream = self._stream(tmp_path, force=False)
        code, _, _, err = _run(["bumptest", str(stream), "--record", "--machines", str(tmp_path / "m.toml")])
        assert code == 2 and "leave out --machines" in err

    def test_table_without_force_or_registry(self, tmp_path: Path) -> None:
        stream = self._stream(tmp_path, force=False)
        code, _, out, err = _run(["bumptest", str(stream)])
        assert code == 0, err
        assert "tb-1/top-h: 3 hit(s), response spectrum" in out
        assert f"{self.FN:9.3f}"[:7] in out  # 42.0xx Hz in the frequency column

    def test_errors_are_one_sentence(self, tmp_path: Path) -> None:
        code, _, out, err = _run(["bumptest", str(tmp_path / "none.jsonl")])
        assert code == 2 and "does not exist" in err
        empty = tmp_path / "e.jsonl"
        empty.write_text("not json\n")
        code, _, _, err = _run(["bumptest", str(empty)])
        assert code == 1 and "holds no response waveform" in err
        code, _, _, err = _run(["bumptest", str(empty), "--band", "50", "10"])
        assert code == 2 and "--band" in err


class TestPassageCommand:
    @staticmethod
    def _run_up(tmp_path: Path, stored_hz: float) -> tuple[Path, Path]:
        """A registry with the mode stored at ``stored_hz`` and a simulated run-up stream
        through a 15 Hz mode (zeta 0.03)."""
        fs = 512.0
        machine = Machine(
            id="rig-1", speed_range_rpm=(300.0, 1500.0), excitation_orders=(1.0, 2.0),
            points=(Point("de-h", "horizontal", "acceleration", "m/s^2", fs),),
            modes=(Mode("frame lateral", stored_hz, damping_ratio=0.03),),
        )
        reg = tmp_path / "rig.toml"
        reg.write_text(dump_registry(Registry((machine,))))
        model = MachineModel("rig-1", modes=(ModalMode(15.0, 0.03, 100.0),),
                             rigid_mass_kg=None, unbalance_kg_m=2e-3, sensor_noise_m_s2=1e-3)
        readings = simulate_run(model, SpeedProfile.ramp(8.0, 24.0, 160.0), points=["de-h"],
                                fs_hz=fs, block_samples=1024, interval_s=1.6, start_ts=T0,
                                seed=3)
        assert isinstance(readings[0], SpeedReading)
        stream = tmp_path / "run.jsonl"
        write_stream(stream, (reading_message(r) for r in readings))
        return reg, stream

    def test_simulated_run_up(self, tmp_path: Path) -> None:
        reg, stream = self._run_up(tmp_path, 15.0)
        code, docs, _, err = _run(["passage", str(stream), "--machines", str(reg),
                                   "--machine", "rig-1", "--json"])
        assert code == 0, err
        (doc,) = docs
        (p,) = doc["passages"]
        # the simulated mode is at 15 Hz; velocity of the unbalance response peaks within
        # O(zeta^2) of it; 1.5 % allows for the 0.16 Hz spacing of the readings
        assert p["critical_speed_rpm"] == pytest.approx(900.0, rel=0.015)
        # API 684 AF ~ 1 / (2 zeta) (Thomson: quality factor); tolerance: 15 %, engineering choice:
        # the half-power width 2 zeta fn = 0.9 Hz spans only about 6 readings 0.16 Hz apart
        assert p["amplification_factor"] == pytest.approx(1 / (2 * 0.03), rel=0.15)
        assert doc["comparison"][0]["status"] == "unchanged"
        # stored mode zeta 0.03 -> AF = 1 / (2 zeta) = 16.67 -> API 684:
        # below 17 (1 - 1 / (AF - 1.5)) = 15.879 %, above 10 % more = 25.879 %;
        # 1x band [15 (1 - 0.25879), 15 (1 + 0.15879)] Hz = 667.1-1042.9 r/min, 2x half
        af = 1 / (2 * 0.03)
        below = 17 * (1 - 1 / (af - 1.5))
        lo, hi = 60 * 15 * (1 - (10 + below) / 100), 60 * 15 * (1 + below / 100)
        stored = [(b["low_rpm"], b["high_rpm"]) for b in doc["skip_bands"]["stored_modes"]]
        assert stored == [(pytest.approx(lo / 2), pytest.approx(hi / 2)),
                          (pytest.approx(lo), pytest.approx(hi))]
        assert (lo, hi) == (pytest.approx(667.1, abs=0.05), pytest.approx(1042.9, abs=0.05))
        assert doc["bode"]["direction"] == "run-up"

    def test_record_a_moved_mode_from_a_run_up(self, tmp_path: Path, database_url: str) -> None:
        from monitor.store import upgrade

        # Stored at 17 Hz, the simulated mode is at 15 Hz: (15 - 17) / 17 = -11.8 %, beyond
        # twice the 5 % tolerance (common practice), so the alarm is an alert.
        reg, stream = self._run_up(tmp_path, 17.0)
        upgrade(database_url)
        assert _run(["machines", "import", str(reg), "--database", database_url])[0] == 0
        code, docs, _, err = _run(["passage", str(stream), "--record", "--database", database_url,
                                   "--machine", "rig-1", "--json"])
        assert code == 0, err
        (doc,) = docs
        assert doc["comparison"][0]["shift_pct"] == pytest.approx(-11.8, abs=1.0)
        (t,) = doc["alarm_transitions"]
        check_alarm_event(t)  # passage --record --json prints the documented shape
        assert (t["kind"], t["subject"], t["transition"], t["severity"]) == (
            "mode_shift", "frame lateral", "raised", "alert")
        assert t["evidence"]["source"] == "run-up/coast-down"
        code, _, _, err = _run(["passage", str(stream), "--machine", "rig-1"])
        assert code == 2 and "--machines REGISTRY is required" in err

    def test_unknown_machine(self, tmp_path: Path) -> None:
        reg = tmp_path / "r.toml"
        reg.write_text(dump_registry(Registry((Machine(id="x-1"),))))
        stream = tmp_path / "s.jsonl"
        stream.write_text("")
        code, _, _, err = _run(["passage", str(stream), "--machines", str(reg),
                                "--machine", "nope"])
        assert code == 2 and "'nope' is not in the registry" in err
