"""Recorded waveforms in: the WAV, CSV and Universal File Format (data-set 58) readers
against reference writers, ``whirlwatch import`` into a stream file and into the store
through the service's batch path, ``whirlwatch bumptest`` on a recording, and the one
sentence a bad file gets.

Reference writers: scipy.io.wavfile.write (8-bit unsigned, 16- and 32-bit signed PCM,
32- and 64-bit IEEE float), the standard library's ``wave`` module (24-bit PCM, which scipy
does not write), Python's csv module, and a small writer of data-set 58 in this file that
follows the published record layout (formats as in monitor/io/uff58.py's docstring).
"""

from __future__ import annotations

import base64
import csv
import json
import math
import wave

import numpy as np
import pytest
from click.testing import CliRunner
from scipy.io import wavfile
from service_helpers import PLANT, plant_store
from sqlalchemy import func, select

from monitor.analysis.waveform import analyse_waveform
from monitor.cli import main
from monitor.io.recording import RecordingError
from monitor.io.recording_files import ChannelMap, read_recording, to_waveforms
from monitor.io.streams import read_messages
from monitor.io.uff58 import rate_from_increment
from monitor.model.registry_file import load_registry
from monitor.store import Store
from monitor.store.models import Measurement, SpectrumSnapshot

FS = 2560.0
T0 = 1_780_000_000.0  # 2026-05-28T20:26:40Z, any fixed start


def _signal(n: int = 4096, fs: float = FS, amp: float = 0.5) -> np.ndarray:
    """Two sinusoids under full scale (a 1x and a 2x of a 24.7 Hz shaft)."""
    t = np.arange(n) / fs
    return amp * np.sin(2 * np.pi * 24.7 * t) + 0.3 * amp * np.sin(2 * np.pi * 49.4 * t + 0.4)


def _run(*args: str):
    return CliRunner().invoke(main, list(args))


def _one_sentence(text: str, name: str) -> None:
    line = text.strip().splitlines()[-1]
    assert line.startswith("Error: ") and name in line and line.endswith("."), text
    assert line.count(". ") == 0 or "e.g." in line, line


# ----------------------------------------------------------------------------- WAV

# (numpy type, to integer counts, one quantisation step in full-scale units): 8-bit is
# unsigned with its zero at 128 and n-bit signed PCM spans [-2^(n-1), 2^(n-1)) (the WAVE
# format's PCM conventions, Microsoft/IBM RIFF specification 1991, from memory).
WAV_INTS = {
    "uint8": (np.uint8, lambda x: np.round(x * 128) + 128, 1 / 128),
    "int16": (np.int16, lambda x: np.round(x * 2**15), 1 / 2**15),
    "int32": (np.int32, lambda x: np.round(x * 2**31), 1 / 2**31),
}


@pytest.mark.parametrize("kind", ["uint8", "int16", "int32", "float32", "float64"])
def test_wav_every_scipy_format_recovers_its_samples(tmp_path, kind):
    x = np.stack([_signal(), -0.5 * _signal()], axis=1)  # two channels
    path = tmp_path / f"{kind}.wav"
    if kind in WAV_INTS:
        dtype, counts, step = WAV_INTS[kind]
        wavfile.write(path, int(FS), counts(x).astype(dtype))
    else:
        step = float(np.finfo(kind).eps)
        wavfile.write(path, int(FS), x.astype(kind))
    rec = read_recording(path)
    assert [c.fs_hz for c in rec.channels] == [FS, FS]
    cal = 9.80665  # e.g. 1 g per full scale, in m/s^2 (SI Brochure: standard gravity)
    waves = to_waveforms(rec, "m", ChannelMap(["a", "b"], ["m/s^2"], [cal]), start_ts=T0)
    for w, col in zip(waves, x.T, strict=True):
        # Within half a quantisation step of the format, scaled by the calibration.
        assert np.max(np.abs(w.samples - cal * col)) <= cal * (0.5 * step + 1e-12)
        assert w.ts == T0 and w.fs_hz == FS and w.unit == "m/s^2"


def test_wav_24_bit_from_the_standard_library_writer(tmp_path):
    x = _signal()
    counts = np.round(x * 2**23).astype(np.int64)
    path = tmp_path / "p24.wav"
    with wave.open(str(path), "wb") as w:
        w.setnchannels(1)
        w.setsampwidth(3)
        w.setframerate(int(FS))
        w.writeframes(b"".join(int(c).to_bytes(3, "little", signed=True) for c in counts))
    (ch,) = read_recording(path).channels
    assert np.max(np.abs(ch.samples - x)) <= 0.5 / 2**23 + 1e-12  # half a 24-bit step


def test_truncated_and_empty_wav_are_refused_in_one_sentence(tmp_path):
    good = tmp_path / "good.wav"
    wavfile.write(good, int(FS), (_signal() * 2**15).astype(np.int16))
    cut = tmp_path / "cut.wav"
    cut.write_bytes(good.read_bytes()[:-1000])
    with pytest.raises(RecordingError, match="truncated"):
        read_recording(cut)
    r = _run("import", str(cut), "--machine", "m", "--point", "p", "--unit", "g", "--out", str(tmp_path / "o.jsonl"))
    assert r.exit_code == 1
    _one_sentence(r.output, "cut.wav")
    empty = tmp_path / "empty.wav"
    empty.write_bytes(b"")
    r = _run("import", str(empty), "--machine", "m", "--point", "p", "--out", str(tmp_path / "o.jsonl"))
    assert r.exit_code == 1 and "is empty" in r.output
    head = tmp_path / "head.wav"
    head.write_bytes(good.read_bytes()[:30])
    with pytest.raises(RecordingError, match="not a readable WAV"):
        read_recording(head)


# ----------------------------------------------------------------------------- CSV


def test_csv_time_column_gives_the_sample_rate(tmp_path):
    x = _signal(2048)
    path = tmp_path / "rec.csv"
    with path.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["time", "de-h [m/s^2]"])
        # Six decimals: 1/2560 s = 0.000390625 s is printed rounded, as loggers do.
        w.writerows([f"{i / FS:.6f}", repr(float(v))] for i, v in enumerate(x))
    (ch,) = read_recording(path).channels
    # The rate from the first and last time: (n - 1) / (t_last - t_first), t_last rounded to 1 us.
    assert ch.fs_hz == pytest.approx(FS, rel=1e-6) and ch.unit == "m/s^2" and ch.name == "de-h"
    assert np.array_equal(ch.samples, x)


def test_csv_without_time_takes_the_given_rate_and_iso_times_give_the_start(tmp_path):
    path = tmp_path / "plain.csv"
    path.write_text("\n".join(f"{float(v)!r};{-float(v)!r}" for v in _signal(256)))
    rec = read_recording(path, fs_hz=1000.0)
    assert [c.fs_hz for c in rec.channels] == [1000.0, 1000.0] and rec.start_ts is None
    iso = tmp_path / "iso.csv"
    iso.write_text("ts,acc\n" + "\n".join(f"2026-03-02T03:10:00.{i:03d}Z,{i}" for i in range(100)))
    rec = read_recording(iso)
    assert rec.channels[0].fs_hz == pytest.approx(1000.0) and rec.start_ts == pytest.approx(1772421000.0)


@pytest.mark.parametrize("body, word", [
    ("time,a\n0,1\n0.001,2\n0.003,3\n0.004,4\n", "not uniformly sampled"),  # a missing sample
    ("time,a\n0,1\n0.001,2\n0.001,3\n", "does not increase"),
    ("time,a\n0,1\n0.001,x\n", "not a number"),
    ("# only a comment\n", "no data lines"),
])
def test_bad_csv_is_refused_in_one_sentence(tmp_path, body, word):
    path = tmp_path / "bad.csv"
    path.write_text(body)
    r = _run("import", str(path), "--machine", "m", "--point", "p", "--unit", "g", "--start", "0",
             "--out", str(tmp_path / "o.jsonl"))
    assert r.exit_code == 1 and word in r.output, r.output
    _one_sentence(r.output, "bad.csv")


# ----------------------------------------------------------------------------- UFF 58


def _uff58(samples: np.ndarray, fs: float, *, precision: str = "double", even: bool = True,
           func_type: int = 1, units_label: str = "m/s^2", binary: bool = False) -> bytes:
    """One data-set 58 as the published layout writes it (records 1-12; field formats in
    monitor/io/uff58.py), preceded by a data-set 164 (units) that a reader must skip."""
    n = samples.size
    ord_type = 2 if precision == "single" else 4
    out = ["    -1", "   164", "         1SI - mks (Newton)      2", "    -1", "    -1"]
    if binary:
        size = 4 if ord_type == 2 else 8
        out.append(f"    58b{1:6d}{2:6d}{11:12d}{n * size * (1 if even else 2):12d}{0:6d}{0:6d}{0:12d}{0:12d}")
    else:
        out.append("    58")
    out += [f"{'recorded waveform':<80}", f"{'NONE':<80}", f"{'02-Mar-26 03:10:00':<80}",
            f"{'NONE':<80}", f"{'NONE':<80}"]
    out.append(f"{func_type:5d}{0:10d}{0:5d}{0:10d} {'NONE':>10}{101:10d}{3:4d} {'NONE':>10}{0:10d}{0:4d}")
    dx = 1.0 / fs
    out.append(f"{ord_type:10d}{n:10d}{int(even):10d}{0.0:13.5e}{dx if even else 0.0:13.5e}{0.0:13.5e}")
    out.append(f"{17:10d}{0:5d}{0:5d}{0:5d} {'Time':<20} {'s':<20}")
    out.append(f"{12:10d}{1:5d}{0:5d}{0:5d} {'Acceleration':<20} {units_label:<20}")
    out.append(f"{0:10d}{0:5d}{0:5d}{0:5d} {'NONE':<20} {'NONE':<20}")
    out.append(f"{0:10d}{0:5d}{0:5d}{0:5d} {'NONE':<20} {'NONE':<20}")
    text = "\n".join(out) + "\n"
    if binary:
        dtype = "<f4" if ord_type == 2 else "<f8"
        vals = samples if even else np.stack([np.arange(n) / fs, samples], axis=1).ravel()
        return text.encode() + np.asarray(vals, dtype=dtype).tobytes() + b"\n    -1\n"
    if even:
        fmt, per_line = ("{:13.5e}", 6) if ord_type == 2 else ("{:20.12e}", 4)
        vals = [fmt.format(v) for v in samples]
    else:
        fmt = "{:13.5e}{:13.5e}" if ord_type == 2 else "{:13.5e}{:20.12e}"
        vals = [fmt.format(i / fs, v) for i, v in enumerate(samples)]
        per_line = 2
    lines = ["".join(vals[i:i + per_line]) for i in range(0, len(vals), per_line)]
    return (text + "\n".join(lines) + "\n    -1\n").encode()


@pytest.mark.parametrize("precision, even, binary, fs", [
    ("double", True, False, 2560.0), ("single", True, False, 3000.0), ("double", False, False, 1024.0),
    ("double", True, True, 2560.0), ("single", True, True, 51200.0),
])
def test_uff58_recovers_samples_and_sample_rate(tmp_path, precision, even, binary, fs):
    x = _signal(1000, fs)
    path = tmp_path / "rec.uff"
    path.write_bytes(_uff58(x, fs, precision=precision, even=even, binary=binary))
    (ch,) = read_recording(path).channels
    assert ch.fs_hz == fs and ch.unit == "m/s^2" and ch.samples.size == x.size
    # E13.5 keeps 6 significant digits, E20.12 13, float32 24 bits (IEEE 754).
    rel = {("single", False): 5e-6, ("double", False): 5e-13, ("single", True): 2**-24}.get(
        (precision, binary), 1e-15)
    assert np.allclose(ch.samples, x, rtol=rel, atol=1e-15)


def test_uff_data_sets_are_channels_in_file_order(tmp_path):
    x, y = _signal(1000), -2.0 * _signal(1000)
    path = tmp_path / "two.uff"
    path.write_bytes(_uff58(x, FS) + _uff58(y, FS, units_label="g", binary=True))
    out = tmp_path / "two.jsonl"
    r = _run("import", str(path), "--machine", "ef-2", "--point", "-", "--point", "de-h", "--start", "0",
             "--out", str(out))
    assert r.exit_code == 0, r.output
    ((topic, payload),) = list(read_messages(out))
    # The second data-set, its unit from its ordinate units label, samples as float32 (the stream's).
    assert topic == "whirlwatch/ef-2/de-h/waveform" and payload["unit"] == "g" and payload["fs"] == FS
    got = np.frombuffer(base64.b64decode(payload["samples_f32"]), dtype="<f4")
    assert np.allclose(got, y, rtol=2**-23, atol=1e-12)


def test_truncated_binary_uff_is_refused(tmp_path):
    path = tmp_path / "cut.uff"
    path.write_bytes(_uff58(_signal(1000), FS, binary=True)[:-3000])
    with pytest.raises(RecordingError, match="truncated"):
        read_recording(path)


def test_increment_field_digits_give_the_sample_rate():
    # 1/3000 s written as E13.5 is 3.33333e-04: 3000 Hz, not 3000.003 Hz (common practice).
    assert rate_from_increment("3.33333e-04") == 3000.0
    assert rate_from_increment(f"{1 / 51200:13.5e}") == 51200.0
    assert rate_from_increment(f"{1 / 2560:20.12e}") == 2560.0


@pytest.mark.parametrize("mutate, word", [
    (lambda b: b.replace(b"         4      1000         1", b"         x      1000         1", 1),
     "published layout"),
    (lambda b: b.replace(b"    1         0", b"    4         0", 1), "frequency response function"),
    (lambda b: b[: len(b) // 2], "closing '-1'"),
    (lambda b: b"not a universal file\n" + b, "no universal file"),
    (lambda b: b"", "is empty"),
])
def test_bad_uff_is_refused_in_one_sentence(tmp_path, mutate, word):
    path = tmp_path / "bad.uff"
    path.write_bytes(mutate(_uff58(_signal(1000), FS)))
    r = _run("import", str(path), "--machine", "m", "--point", "p", "--out", str(tmp_path / "o.jsonl"))
    assert r.exit_code == 1 and word in r.output, r.output
    _one_sentence(r.output, "bad.uff")


# ----------------------------------------------------------------------------- import


def test_import_to_a_stream_file_that_analyse_reads(tmp_path):
    path = tmp_path / "two.wav"
    wavfile.write(path, int(FS), np.stack([_signal(8192), _signal(8192)], axis=1).astype(np.float32))
    out = tmp_path / "two.jsonl"
    r = _run("import", str(path), "--machine", "ef-2", "--point", "de-h", "--point", "-", "--unit", "g",
             "--calibration", "2", "--start", "2026-03-02T03:10:00Z", "--block-samples", "4096",
             "--speed-hz", "24.7", "--out", str(out))
    assert r.exit_code == 0, r.output
    msgs = list(read_messages(out))
    # 8192 samples in blocks of 4096: two readings of the one mapped channel.
    assert [t for t, _ in msgs] == ["whirlwatch/ef-2/de-h/waveform"] * 2
    assert [p["ts"] for _, p in msgs] == ["2026-03-02T03:10:00.000Z", "2026-03-02T03:10:01.600Z"]
    assert {(p["fs"], p["unit"], p["speed_hz"]) for _, p in msgs} == {(FS, "g", 24.7)}
    r = _run("analyse", str(out), "--machines", str(PLANT), "--json")
    assert r.exit_code == 0 and len([x for x in r.stdout.splitlines() if x.startswith("{")]) == 2, r.output


def test_channel_map_must_fit(tmp_path):
    path = tmp_path / "two.wav"
    wavfile.write(path, int(FS), np.stack([_signal(), _signal()], axis=1).astype(np.float32))
    r = _run("import", str(path), "--machine", "m", "--point", "p", "--unit", "g", "--out", str(tmp_path / "o.jsonl"))
    assert r.exit_code == 1 and "2 channel(s)" in r.output
    _one_sentence(r.output, "two.wav")
    r = _run("import", str(path), "--machine", "m", "--point", "p", "--point", "q", "--out", str(tmp_path / "o.jsonl"))
    assert r.exit_code == 1 and "--unit" in r.output
    r = _run("import", str(tmp_path / "nope.wav"), "--machine", "m", "--point", "p", "--out", "x.jsonl")
    assert r.exit_code == 2 and "nope.wav" in r.output


def test_import_into_the_store_through_the_service(tmp_path):
    url = f"sqlite:///{tmp_path / 'store.db'}"
    plant_store(url)
    x = _signal(4 * 4096, amp=0.25)
    path = tmp_path / "rec.wav"
    wavfile.write(path, int(FS), np.round(x * 2**15).astype(np.int16))
    r = _run("import", str(path), "--machine", "ef-2", "--point", "de-h", "--unit", "m/s^2",
             "--calibration", "40", "--start", "2026-03-02T03:10:00Z", "--block-samples", "4096",
             "--speed-hz", "24.7", "--store", "--database", url)
    assert r.exit_code == 0, r.output
    assert "4 of 4 readings" in r.output
    store = Store.open(url)
    try:
        with store.session() as s:
            assert s.scalar(select(func.count()).select_from(Measurement).where(
                Measurement.machine_id == "ef-2", Measurement.point_id == "de-h")) == 4
            snaps = list(s.scalars(select(SpectrumSnapshot).where(SpectrumSnapshot.machine_id == "ef-2")
                                   .order_by(SpectrumSnapshot.ts)))
            first = s.scalars(select(Measurement).where(Measurement.machine_id == "ef-2")
                              .order_by(Measurement.ts)).first()
            overall = first.overall_velocity_mm_s_rms
    finally:
        store.close()
    assert snaps, "the service stored no spectrum"
    # The stored spectrum of the first reading is the analysis of the same samples (the
    # import's samples: int16 counts / 2^15 x calibration).
    registry = load_registry(PLANT)
    m = registry.machine("ef-2")
    rec = read_recording(path)
    (w, *_) = to_waveforms(rec, "ef-2", ChannelMap(["de-h"], ["m/s^2"], [40.0]), start_ts=1772421000.0,
                           block_samples=4096)
    from dataclasses import replace

    a = analyse_waveform(replace(w, speed_hz=24.7), m, m.point("de-h"))
    assert overall == pytest.approx(a.overall_velocity_mm_s_rms, rel=1e-9)
    by_kind = {sn.kind: sn for sn in snaps if sn.ts.timestamp() == 1772421000.0}
    refs = {"native": a.spectrum, "velocity": a.velocity_spectrum, "envelope": a.envelope_spectrum}
    assert {"native", "velocity"} <= set(by_kind), sorted(by_kind)
    for kind, sn in by_kind.items():
        ref = refs[kind]
        assert ref is not None and sn.n_bins == ref.amplitude.size
        # Stored as float32 (monitor/store/models.py): equal to float32 rounding.
        assert np.allclose(sn.amplitude_array(), ref.amplitude, rtol=2**-23, atol=1e-12 * ref.amplitude.max())
    # And against the signal itself: its 24.7 Hz sinusoid of 0.25 full scale x 40 m/s^2 =
    # 10 m/s^2 peak reads, on the largest bin near it, between 10 and 10 less the Hann
    # window's worst scalloping loss, 1.42 dB (Harris 1978, Table 1).
    native = by_kind["native"]
    amp = native.amplitude_array().astype(float) * (math.sqrt(2) if native.scaling == "rms" else 1.0)
    near = np.abs(native.freq_hz() - 24.7) <= native.df_hz
    assert 10 * 10 ** (-1.42 / 20) * 0.99 <= amp[near].max() <= 10 * 1.01
    # A machine the store does not know is not stored, and the command says so.
    r = _run("import", str(path), "--machine", "nope", "--point", "de-h", "--unit", "m/s^2",
             "--start", "0", "--store", "--database", url)
    assert r.exit_code == 1 and "unknown" in r.output, r.output


# ----------------------------------------------------------------------------- bumptest


def test_bumptest_reads_a_wav_with_force_and_response_channels(tmp_path):
    from scipy import signal

    fs, fn, zeta, mass = 2048.0, 42.0, 0.02, 5.0
    t = np.arange(4096) / fs
    force = np.where((t >= 0.01) & (t < 0.013), 300 * np.sin(np.pi * (t - 0.01) / 0.003), 0.0)
    wn = 2 * math.pi * fn
    # Acceleration of a mass-spring-damper: s^2 / (m (s^2 + 2 zeta wn s + wn^2)) (Thomson).
    _, acc, _ = signal.lsim(signal.lti([1 / mass, 0, 0], [1, 2 * zeta * wn, wn * wn]), force, t)
    path = tmp_path / "hit.wav"
    wavfile.write(path, int(fs), np.stack([force / 1000, acc / 1000], axis=1).astype(np.float64))
    r = _run("bumptest", str(path), "--machine", "tb-1", "--point", "hammer", "--point", "top-h",
             "--unit", "N", "--unit", "m/s^2", "--calibration", "1000", "--force-point", "hammer", "--json")
    assert r.exit_code == 0, r.output
    (doc,) = [json.loads(x) for x in r.stdout.splitlines() if x.startswith("{")]
    # The damped SDOF's peak lies at fn within one frequency bin (fs / n = 0.5 Hz).
    assert abs(doc["modes"][0]["frequency_hz"] - fn) <= fs / 4096
    r = _run("bumptest", str(path), "--force-point", "hammer")
    assert r.exit_code == 2 and "--machine" in r.output
