"""``whirlwatch analyse`` on small generated stream files, checked against closed forms."""

from __future__ import annotations

import json
import math
import re
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from monitor.cli import main
from monitor.io.streams import reading_message, write_stream
from monitor.model.readings import SpeedReading, Waveform
from monitor.model.registry import Machine, Point, Registry
from monitor.model.registry_file import dump_registry
from monitor.sim.simulate import MachineModel, simulate_reading

FS = 2560.0
N = 8192
T0 = 1772431200.0  # 2026-03-02T06:00:00Z
KEYS = {"machine", "point", "ts", "speed_hz", "speed_source", "overall_velocity_mm_s_rms",
        "orders", "peaks"}  # README.md, "Analysing a stream file", `analyse --json`


def _registry(tmp_path: Path) -> Path:
    machine = Machine(
        id="rig-1", machine_class="group2/rigid", speed_range_rpm=(600.0, 1800.0),
        excitation_orders=(1.0, 2.0),
        points=(Point("de-h", "horizontal", "acceleration", "m/s^2", FS),),
    )
    path = tmp_path / "machines.toml"
    path.write_text(dump_registry(Registry(machines=(machine,))))
    return path


def _sine(ts: float, f_hz: float, amp: float, **kw: object) -> Waveform:
    t = np.arange(N) / FS
    x = amp * np.sin(2 * np.pi * f_hz * t) + 0.3 * amp * np.sin(2 * np.pi * 2 * f_hz * t + 1.0)
    return Waveform("rig-1", "de-h", ts, FS, "m/s^2", x, **kw)  # type: ignore[arg-type]


def _run(args: list[str]) -> tuple[int, list[dict], str]:
    result = CliRunner().invoke(main, args)
    lines = [json.loads(line) for line in result.stdout.splitlines() if line.strip()]
    return result.exit_code, lines, result.stderr


class TestJson:
    def test_pure_sines_measured_and_estimated_speed(self, tmp_path: Path) -> None:
        f1, amp = 19.7, 2.0  # Hz, m/s^2 peak at 1x; 2x at 30 % of it
        msgs = [
            reading_message(SpeedReading("rig-1", T0, f1)),
            reading_message(_sine(T0 + 1.0, f1, amp)),        # speed reading 1 s earlier
            reading_message(_sine(T0 + 600.0, f1, amp)),      # no speed within 5 s
        ]
        stream = tmp_path / "s.jsonl"
        write_stream(stream, msgs)
        with stream.open("a") as fh:  # traffic a live broker could carry, all refused
            fh.write("not json at all\n")
            fh.write('{"topic": "whirlwatch/nope/de-h/waveform", "payload": {"ts": 1}}\n')
        code, rows, err = _run(["analyse", str(stream), "--machines", str(_registry(tmp_path)), "--json"])
        assert code == 0, err
        assert len(rows) == 2
        assert "2 messages rejected" in err and "malformed_line" in err and "unknown_machine" in err
        for row, source in zip(rows, ("measured", "estimated"), strict=True):
            assert set(row) >= KEYS
            assert row["machine"] == "rig-1" and row["point"] == "de-h"
            assert row["speed_source"] == source
            # measured: the speed sent; estimated: within one tenth of a 0.3125 Hz bin
            assert row["speed_hz"] == pytest.approx(f1, abs=1e-9 if source == "measured" else 0.03)
            # a sine's amplitude (peak) is its amplitude; orders in the point's unit
            assert row["orders"]["1"] == pytest.approx(amp, rel=0.01)
            assert row["orders"]["2"] == pytest.approx(0.3 * amp, rel=0.01)
            # v = a / (2 pi f), RMS = peak / sqrt 2 (both lines inside 10-1000 Hz)
            v1 = amp / (2 * math.pi * f1) / math.sqrt(2) * 1e3
            v2 = 0.3 * amp / (2 * math.pi * 2 * f1) / math.sqrt(2) * 1e3
            # tolerance: 2 %, engineering choice: the band RMS also holds the Hann leakage
            # skirts, and the estimated speed may sit 0.03 Hz off
            assert row["overall_velocity_mm_s_rms"] == pytest.approx(math.hypot(v1, v2), rel=0.02)
            assert row["peaks"][0]["hz"] == pytest.approx(f1, abs=0.03)

    def test_simulated_unbalance_on_the_mass_line(self, tmp_path: Path) -> None:
        # A free rigid mass M under a rotating unbalance U: a = U Omega^2 / M (Newton's
        # second law); far above the mount mode (here r = 10, zeta = 0.02) the mount term
        # adds r^2/(r^2 - 1) = 1.0101 (Thomson, rotating unbalance), included below.
        speed, mass, u = 20.0, 500.0, 0.005
        model = MachineModel("rig-1", rigid_mass_kg=mass, mount_frequency_hz=2.0,
                             mount_damping_ratio=0.02, unbalance_kg_m=u)
        w = simulate_reading(model, "de-h", speed_hz=speed, ts=T0, fs_hz=FS, n_samples=N,
                             include_speed=True)
        stream = tmp_path / "sim.jsonl"
        write_stream(stream, [reading_message(w)])
        code, rows, err = _run(["analyse", str(stream), "--machines", str(_registry(tmp_path)), "--json"])
        assert code == 0, err
        r = speed / 2.0
        expected = u * (2 * math.pi * speed) ** 2 / mass * r * r / math.hypot(1 - r * r, 2 * 0.02 * r)
        assert rows[0]["speed_source"] == "measured"
        assert rows[0]["speed_hz"] == pytest.approx(speed)  # measured: the speed sent
        # tolerance: 1 %, engineering choice for the simulator's discrete-time response
        assert rows[0]["orders"]["1"] == pytest.approx(expected, rel=0.01)


class TestTableAndErrors:
    def test_table(self, tmp_path: Path) -> None:
        stream = tmp_path / "s.jsonl"
        write_stream(stream, [reading_message(_sine(T0, 15.0, 1.0, speed_hz=15.0))])
        result = CliRunner().invoke(main, ["analyse", str(stream), "--machines", str(_registry(tmp_path))])
        assert result.exit_code == 0, result.stderr
        header, row = result.stdout.splitlines()[:2]
        # Every column says what it holds and in which unit; no bare "s" column.
        assert re.split(r"\s{2,}", header.strip()) == [
            "time (UTC)", "machine/point", "speed Hz", "speed from", "mm/s RMS", "1x mm/s pk",
            "2x mm/s pk", "largest peaks (sensor unit, peak)"]
        cells = row.split()
        assert cells[1:4] == ["rig-1/de-h", "15.00", "measured"]
        # Harmonic motion: velocity peak = acceleration peak / (2 pi f); 1 m/s^2 at 15 Hz
        # and 0.3 m/s^2 at 30 Hz (textbook kinematics), in mm/s.
        assert float(cells[5]) == pytest.approx(1.0 / (2 * math.pi * 15.0) * 1e3, rel=0.01)
        assert float(cells[6]) == pytest.approx(0.3 / (2 * math.pi * 30.0) * 1e3, rel=0.01)
        assert row.endswith("(m/s^2 pk)") and "15.0 Hz 1" in row

    def test_every_message_rejected_exits_with_1(self, tmp_path: Path) -> None:
        stream = tmp_path / "s.jsonl"
        stream.write_text("not json at all\n"
                          '{"topic": "whirlwatch/nope/de-h/waveform", "payload": {"ts": 1}}\n')
        result = CliRunner().invoke(main, ["analyse", str(stream), "--machines", str(_registry(tmp_path))])
        # Before: exit 0 with nothing analysed. A script must see that nothing was usable.
        assert result.exit_code == 1
        assert "0 waveforms analysed, 2 messages rejected" in result.stderr
        assert "every message of" in result.stderr and "s.jsonl" in result.stderr
        # One good waveform among the rejected ones is a success (the rejections reported).
        write_stream(stream, [reading_message(_sine(T0, 15.0, 1.0, speed_hz=15.0))])
        with stream.open("a") as fh:
            fh.write("not json at all\n")
        result = CliRunner().invoke(main, ["analyse", str(stream), "--machines", str(_registry(tmp_path))])
        assert result.exit_code == 0 and "1 waveforms analysed, 1 messages rejected" in result.stderr

    def test_missing_file_is_one_sentence(self, tmp_path: Path) -> None:
        result = CliRunner().invoke(
            main, ["analyse", str(tmp_path / "nope.jsonl"), "--machines", str(_registry(tmp_path))]
        )
        assert result.exit_code == 2 and "nope.jsonl" in result.stderr

    def test_bad_registry_names_the_file(self, tmp_path: Path) -> None:
        bad = tmp_path / "bad.toml"
        bad.write_text("[[machines]]\nid = 'x y'\n")
        stream = tmp_path / "s.jsonl"
        write_stream(stream, [])
        result = CliRunner().invoke(main, ["analyse", str(stream), "--machines", str(bad)])
        assert result.exit_code == 1 and "bad.toml" in result.stderr


class TestSimulateCommand:
    def test_rig_run_up_is_deterministic(self, tmp_path: Path) -> None:
        args = ["simulate", "--scenario", "run-up", "--duration", "20", "--speed-hz", "20"]
        a = CliRunner().invoke(main, [*args, "--out", str(tmp_path / "a")])
        b = CliRunner().invoke(main, [*args, "--out", str(tmp_path / "b")])
        assert a.exit_code == 0 and b.exit_code == 0, a.stderr
        assert (tmp_path / "a" / "rig-1.jsonl").read_bytes() == (tmp_path / "b" / "rig-1.jsonl").read_bytes()
        code, rows, err = _run(["analyse", str(tmp_path / "a" / "rig-1.jsonl"),
                                "--machines", str(tmp_path / "a" / "rig.toml"), "--json"])
        assert code == 0 and rows and all(r["speed_source"] == "measured" for r in rows), err

    def test_unknown_machine(self, tmp_path: Path) -> None:
        result = CliRunner().invoke(main, ["simulate", "--out", str(tmp_path), "--machine", "zz"])
        assert result.exit_code == 2 and "'zz'" in result.stderr
