"""Stream file format (monitor/io/streams.py) and the sample streams."""

from __future__ import annotations

import base64
import json
import math
from pathlib import Path

import numpy as np
import pytest

from monitor.io.ingest import decode_message
from monitor.io.ingest_limits import IngestLimits
from monitor.io.streams import (
    StreamError,
    read_stream,
    reading_message,
    speed_payload,
    speed_topic,
    waveform_payload,
    waveform_topic,
    write_stream,
)
from monitor.model.readings import SpeedReading, Waveform
from monitor.model.registry import Machine, Point, Registry
from monitor.model.registry_file import load_registry

SAMPLES = Path(__file__).resolve().parent.parent / "sample_streams"
# 2026-03-02T06:00:00Z as epoch seconds (Python datetime, independent of our code)
TS = 1772431200.0


class TestPayloads:
    def test_waveform_payload_is_little_endian_float32_base64(self) -> None:
        x = np.array([1.0, -2.5, 3.25])  # exactly representable in float32
        w = Waveform("af-3", "de-h", TS, 2560.0, "m/s^2", x, speed_hz=12.5, reading_id="r1")
        p = waveform_payload(w)
        assert p["ts"] == "2026-03-02T06:00:00.000Z"
        assert p["fs"] == 2560.0 and p["unit"] == "m/s^2"
        assert p["speed_hz"] == 12.5 and p["id"] == "r1"
        # IEEE 754 binary32, little-endian: 1.0 = 0x3F800000
        raw = base64.b64decode(p["samples_f32"])
        assert raw[:4] == bytes([0x00, 0x00, 0x80, 0x3F])
        assert np.array_equal(np.frombuffer(raw, "<f4"), x.astype(np.float32))

    def test_once_per_rev_pulses_written_only_when_present(self) -> None:
        x = np.zeros(128)
        old = waveform_payload(Waveform("af-3", "de-h", TS, 2560.0, "m/s^2", x))
        assert set(old) == {"ts", "fs", "unit", "samples_f32"}  # old payloads unchanged
        pulses = np.array([0.0, 1 / 3, 0.04])  # 1/3 is not exact in binary: must round-trip
        p = waveform_payload(Waveform("af-3", "de-h", TS, 2560.0, "m/s^2", x, once_per_rev_s=pulses))
        assert p["once_per_rev_s"] == pulses.tolist()

    def test_speed_payload_and_topics(self) -> None:
        assert speed_payload(SpeedReading("af-3", TS, 24.5)) == {
            "ts": "2026-03-02T06:00:00.000Z", "hz": 24.5
        }
        assert waveform_topic("ww", "af-3", "de-h") == "ww/af-3/de-h/waveform"
        assert speed_topic("ww", "af-3") == "ww/af-3/speed"


class TestFiles:
    def test_round_trip_bytes_are_the_payload_json(self, tmp_path: Path) -> None:
        w = Waveform("af-3", "de-h", TS, 2560.0, "m/s^2", np.arange(128.0))
        msgs = [reading_message(SpeedReading("af-3", TS, 10.0)), reading_message(w)]
        path = tmp_path / "s.jsonl"
        assert write_stream(path, msgs) == 2
        got = list(read_stream(path))
        assert [t for t, _ in got] == ["whirlwatch/af-3/speed", "whirlwatch/af-3/de-h/waveform"]
        assert [json.loads(b) for _, b in got] == [p for _, p in msgs]
        assert len(path.read_text().splitlines()) == 2

    def test_pulses_round_trip_through_a_file_and_ingest(self, tmp_path: Path) -> None:
        reg = Registry((Machine(id="af-3", points=(Point("de-h", "horizontal", "acceleration",
                                                          "m/s^2", 2560.0),)),))
        pulses = 0.0123 + np.arange(3) / 24.7  # inside the 0.2 s of 512 samples at 2560 Hz
        w = Waveform("af-3", "de-h", TS, 2560.0, "m/s^2", np.zeros(512), once_per_rev_s=pulses)
        path = tmp_path / "p.jsonl"
        write_stream(path, [reading_message(w)])
        ((topic, payload),) = list(read_stream(path))
        got = decode_message(topic, payload, reg, now=TS, limits=IngestLimits())
        # repr of a double reads back to the same double (Python float repr)
        assert got.once_per_rev_s.tolist() == pulses.tolist()

    @pytest.mark.parametrize(
        "line, problem",
        [
            ("{not json", "not valid JSON"),
            ("[1, 2]", "expected an object"),
            ('{"payload": {}}', "'topic'"),
            ('{"topic": "a/b/speed"}', "'payload' is missing"),
        ],
    )
    def test_malformed_line_names_file_and_line(self, tmp_path: Path, line: str, problem: str) -> None:
        path = tmp_path / "bad.jsonl"
        path.write_text('{"topic": "x/y/speed", "payload": {"ts": 1, "hz": 2}}\n\n' + line + "\n")
        with pytest.raises(StreamError, match=problem) as info:
            list(read_stream(path))
        assert info.value.line == 3 and "bad.jsonl, line 3" in str(info.value)

    def test_on_error_skips_and_reports(self, tmp_path: Path) -> None:
        path = tmp_path / "mixed.jsonl"
        path.write_text('garbage\n{"topic": "x/y/speed", "payload": {"ts": 1, "hz": 2}}\n')
        errors: list[StreamError] = []
        assert len(list(read_stream(path, on_error=errors.append))) == 1
        assert [e.line for e in errors] == [1]


class TestSampleStreams:
    def test_registry_validates_and_points_match_streams(self) -> None:
        registry = load_registry(SAMPLES / "plant.toml")
        assert 4 <= len(registry.machines) <= 6
        files = sorted(SAMPLES.glob("*.jsonl"))
        recorded = IngestLimits(max_age_s=math.inf, max_future_s=math.inf)
        assert {f.stem for f in files} == {m.id for m in registry.machines}
        # project budget for the repository: at most 20 MB of streams in all
        assert sum(f.stat().st_size for f in files) <= 20 * 1024 * 1024
        for f in files:
            m = registry.machine(f.stem)
            # the first lines decode like live traffic and match the registry's fs
            for i, (topic, payload) in enumerate(read_stream(f)):
                r = decode_message(topic, payload, registry, limits=recorded)
                if isinstance(r, Waveform):
                    assert r.fs_hz == m.point(r.point).fs_hz
                if i > 4:
                    break

    def test_fan_crosses_its_mode_inside_the_api684_margin(self) -> None:
        # API 684 (from memory): AF ~= 1/(2 zeta); required margin
        # min(16, 17 (1 - 1/(AF - 1.5))) % for a mode below the excitation.
        registry = load_registry(SAMPLES / "plant.toml")
        fan = registry.machine("ef-2")
        mode = fan.modes[0]
        af = 1 / (2 * mode.damping_ratio)
        required = min(16.0, 17.0 * (1 - 1 / (af - 1.5)))
        lo, hi = fan.speed_range_hz
        assert lo < mode.frequency_hz < hi
        speeds = [json.loads(p)["hz"] for t, p in read_stream(SAMPLES / "ef-2.jsonl")
                  if t.endswith("/speed")]
        margins = [abs(s - mode.frequency_hz) / mode.frequency_hz * 100 for s in speeds]
        assert sum(m < required for m in margins) >= 10
