"""Ingest: decoding of waveform and speed payloads, and the rejection corpus.

Expected values come from outside the project: Python's ``struct`` (IEEE 754 float32,
little-endian) and ``base64`` (RFC 4648) for the fast path, ``calendar.timegm`` for
ISO 8601 times, the definition 1 r/min = 1/60 Hz for speeds. The corpus checks the
contract of docs/mqtt.md: every documented reason is reachable and none crashes.
"""

from __future__ import annotations

import base64
import calendar
import json
import random
import re
import struct
from pathlib import Path

import numpy as np
import pytest

from monitor.io.ingest import SPEED_STREAM, decode_message, parse_topic
from monitor.io.ingest_limits import REJECTION_REASONS, IngestLimits, Rejected
from monitor.io.rejection_count import RejectionCounter
from monitor.io.streams import waveform_payload
from monitor.model.readings import SpeedReading, Waveform
from monitor.model.registry_file import parse_registry

NOW = 1_780_000_000.0  # a fixed "now" (2026-05-28) so the age checks do not depend on the clock
DOCS = Path(__file__).resolve().parent.parent / "docs" / "mqtt.md"

REGISTRY = parse_registry(
    {
        "machines": [
            {
                "id": "fan-1",
                "points": [
                    {"id": "de-h", "quantity": "acceleration", "unit": "m/s^2", "fs_hz": 25600},
                    {"id": "nde-v", "quantity": "velocity", "unit": "mm/s"},
                    {"id": "shaft-x", "quantity": "displacement", "unit": "um"},
                ],
            }
        ]
    }
)
WAVE = "whirlwatch/fan-1/de-h/waveform"
SPEED = "whirlwatch/fan-1/speed"


def f32_b64(values) -> str:
    return base64.b64encode(struct.pack(f"<{len(values)}f", *values)).decode("ascii")


def good_wave(**changes) -> dict:
    body = {"ts": NOW - 10, "fs": 25600, "unit": "m/s^2", "samples_f32": f32_b64([0.5] * 256)}
    body.update(changes)
    return {k: v for k, v in body.items() if v is not DROP}


DROP = object()


def dumps(body) -> bytes:
    return json.dumps(body).encode("utf-8")


def wave(**changes) -> bytes:
    return dumps(good_wave(**changes))


def without(*keys) -> bytes:
    return dumps({k: v for k, v in good_wave().items() if k not in keys})


def raw_wave(fragment: str) -> bytes:
    """A waveform payload with one raw JSON fragment (for NaN/Infinity literals)."""
    return ('{"ts": ' + repr(NOW - 10) + ', "fs": 25600, "unit": "m/s^2", ' + fragment + "}").encode()


LIST64 = [0.25] * 64

# (case id, topic, payload, expected reason, limits or None, last_ts or None)
CORPUS = [
    ("huge payload", WAVE, b" " * 2001, "payload_too_large", IngestLimits(max_payload_bytes=2000), None),
    ("wrong prefix", "plant/fan-1/de-h/waveform", wave(), "topic_prefix", None, None),
    ("unknown topic kind", "whirlwatch/fan-1/de-h/spectrum", wave(), "topic_malformed", None, None),
    ("too many levels", "whirlwatch/fan-1/de-h/x/waveform", wave(), "topic_malformed", None, None),
    ("empty machine level", "whirlwatch//de-h/waveform", wave(), "topic_malformed", None, None),
    ("speed with a point", "whirlwatch/fan-1/de-h/speed", wave(), "topic_malformed", None, None),
    ("unknown machine", "whirlwatch/pump-9/de-h/waveform", wave(), "unknown_machine", None, None),
    ("unknown machine speed", "whirlwatch/pump-9/speed", dumps({"ts": NOW, "rpm": 900}), "unknown_machine", None, None),
    ("unknown point", "whirlwatch/fan-1/nde-h/waveform", wave(), "unknown_point", None, None),
    ("latin-1 bytes", WAVE, b'{"unit": "\xb5m"}', "not_utf8", None, None),
    ("utf-16", WAVE, '{"ts": 1}'.encode("utf-16"), "not_utf8", None, None),
    ("empty payload", WAVE, b"", "not_json", None, None),
    ("unquoted keys", WAVE, b"{ts: 1}", "not_json", None, None),
    ("truncated", WAVE, wave()[:-5], "not_json", None, None),
    ("deep nesting", WAVE, b"[" * 100_000, "not_json", None, None),
    ("array", WAVE, b"[1, 2, 3]", "not_object", None, None),
    ("string", WAVE, b'"hello"', "not_object", None, None),
    ("null", WAVE, b"null", "not_object", None, None),
    ("no ts", WAVE, without("ts"), "ts_missing", None, None),
    ("ts list", WAVE, wave(ts=[NOW]), "ts_type", None, None),
    ("ts boolean", WAVE, wave(ts=True), "ts_type", None, None),
    ("ts prose", WAVE, wave(ts="yesterday"), "ts_format", None, None),
    ("ts no zone", WAVE, wave(ts="2026-05-28T10:00:00"), "ts_no_timezone", None, None),
    ("ts negative", WAVE, wave(ts=-5), "ts_invalid", None, None),
    ("ts NaN", WAVE, b'{"ts": NaN, "fs": 25600}', "ts_invalid", None, None),
    ("ts far future", WAVE, wave(ts=NOW + 3600), "ts_future", None, None),
    ("ts too old", WAVE, wave(ts=NOW - 40 * 86400), "ts_too_old", None, None),
    ("ts replayed", WAVE, wave(ts=NOW - 7200), "ts_replayed", None, lambda m, p: NOW - 10),
    ("speed replayed", SPEED, dumps({"ts": NOW - 7200, "hz": 25}), "ts_replayed", None,
     lambda m, p: NOW if p == SPEED_STREAM else None),
    ("no fs", WAVE, without("fs"), "fs_missing", None, None),
    ("fs string", WAVE, wave(fs="25600"), "fs_type", None, None),
    ("fs null", WAVE, wave(fs=None), "fs_type", None, None),
    ("fs Infinity", WAVE, raw_wave('"fs": Infinity'), "fs_not_finite", None, None),
    # A number too large for a double is a number, only an absurd one (docs/mqtt.md,
    # "Rejections": fs_not_finite is for NaN and Infinity, fs_absurd for the range).
    ("fs huge integer", WAVE, wave(fs=10**400), "fs_absurd", None, None),
    ("fs huge decimal", WAVE, raw_wave('"fs": 1e400'), "fs_absurd", None, None),
    ("fs minus huge", WAVE, raw_wave('"fs": -1e400'), "fs_not_positive", None, None),
    ("fs zero", WAVE, wave(fs=0), "fs_not_positive", None, None),
    ("fs negative", WAVE, wave(fs=-25600), "fs_not_positive", None, None),
    ("fs absurdly high", WAVE, wave(fs=1e9), "fs_absurd", None, None),
    ("fs absurdly low", WAVE, wave(fs=0.001), "fs_absurd", None, None),
    ("no unit", WAVE, without("unit"), "unit_missing", None, None),
    ("unknown unit", WAVE, wave(unit="furlong/fortnight^2"), "unit_unknown", None, None),
    ("unit number", WAVE, wave(unit=9.81), "unit_unknown", None, None),
    ("unit case", WAVE, wave(unit="M/S^2"), "unit_unknown", None, None),
    ("velocity unit on accelerometer", WAVE, wave(unit="mm/s"), "unit_wrong_quantity", None, None),
    ("displacement unit on velocity point", "whirlwatch/fan-1/nde-v/waveform", wave(unit="um"),
     "unit_wrong_quantity", None, None),
    ("both sample fields", WAVE, wave(samples=LIST64), "samples_both", None, None),
    ("no samples", WAVE, without("samples_f32"), "samples_missing", None, None),
    ("samples string", WAVE, dumps(good_wave(samples_f32=DROP, samples="1,2,3")), "samples_type", None, None),
    ("samples object", WAVE, dumps(good_wave(samples_f32=DROP, samples={"0": 1})), "samples_type", None, None),
    ("samples numeric strings", WAVE, dumps(good_wave(samples_f32=DROP, samples=["1.0"] * 64)),
     "samples_not_numeric", None, None),
    ("samples mixed string", WAVE, dumps(good_wave(samples_f32=DROP, samples=[1.0] * 63 + ["2"])),
     "samples_not_numeric", None, None),
    ("samples booleans", WAVE, dumps(good_wave(samples_f32=DROP, samples=[1.0] * 63 + [True])),
     "samples_not_numeric", None, None),
    ("samples nulls", WAVE, dumps(good_wave(samples_f32=DROP, samples=[None] * 64)),
     "samples_not_numeric", None, None),
    ("samples nested", WAVE, dumps(good_wave(samples_f32=DROP, samples=[[1, 2]] * 64)),
     "samples_not_numeric", None, None),
    ("samples ragged", WAVE, dumps(good_wave(samples_f32=DROP, samples=[[1, 2], 3] * 32)),
     "samples_not_numeric", None, None),
    ("samples NaN", WAVE, raw_wave('"samples": [' + "1.0, " * 63 + "NaN]"), "samples_not_finite", None, None),
    ("samples beyond a double", WAVE, raw_wave('"samples": [' + "1.0, " * 63 + "1e400]"), "samples_absurd",
     None, None),
    ("samples -Infinity", WAVE, raw_wave('"samples": [-Infinity' + ", 1.0" * 63 + "]"),
     "samples_not_finite", None, None),
    ("f32 number", WAVE, wave(samples_f32=123), "samples_f32_type", None, None),
    ("f32 list", WAVE, wave(samples_f32=LIST64), "samples_f32_type", None, None),
    ("f32 not base64", WAVE, wave(samples_f32="not base64 at all!!"), "samples_f32_base64", None, None),
    ("f32 bad padding", WAVE, wave(samples_f32="AAAA" * 64 + "A"), "samples_f32_base64", None, None),
    ("f32 odd length", WAVE, wave(samples_f32=base64.b64encode(b"\0" * 258).decode()),
     "samples_f32_length", None, None),
    ("f32 NaN", WAVE, wave(samples_f32=f32_b64([1.0] * 63 + [float("nan")])), "samples_f32_not_finite", None, None),
    ("f32 inf", WAVE, wave(samples_f32=f32_b64([float("inf")] + [1.0] * 63)), "samples_f32_not_finite", None, None),
    ("empty list", WAVE, dumps(good_wave(samples_f32=DROP, samples=[])), "samples_empty", None, None),
    ("empty f32", WAVE, wave(samples_f32=""), "samples_empty", None, None),
    ("ten samples", WAVE, wave(samples_f32=f32_b64([1.0] * 10)), "samples_too_few", None, None),
    ("too many list", WAVE, dumps(good_wave(samples_f32=DROP, samples=[0.0] * 5000)), "samples_too_many",
     IngestLimits(max_samples=4096), None),
    ("too many f32", WAVE, wave(samples_f32=f32_b64([0.0] * 5000)), "samples_too_many",
     IngestLimits(max_samples=4096), None),
    # 3e38 is finite in float32 (IEEE 754 binary32 max 3.4028235e38) but beyond any sensor.
    ("f32 at the float32 limit", WAVE, wave(samples_f32=f32_b64([0.5] * 255 + [3.0e38])), "samples_absurd",
     None, None),
    ("list beyond any sensor", WAVE, dumps(good_wave(samples_f32=DROP, samples=[-2e9] + LIST64)),
     "samples_absurd", None, None),
    ("speed both units", WAVE, wave(speed_hz=25.0, speed_rpm=1500), "speed_both", None, None),
    ("speed payload both", SPEED, dumps({"ts": NOW, "hz": 25, "rpm": 1500}), "speed_both", None, None),
    ("speed payload empty", SPEED, dumps({"ts": NOW}), "speed_missing", None, None),
    ("speed string", SPEED, dumps({"ts": NOW, "rpm": "1500"}), "speed_type", None, None),
    ("speed_hz boolean", WAVE, wave(speed_hz=True), "speed_type", None, None),
    ("speed Infinity", SPEED, b'{"ts": 1780000000.0, "hz": Infinity}', "speed_not_finite", None, None),
    ("speed negative", SPEED, dumps({"ts": NOW, "rpm": -1500}), "speed_negative", None, None),
    ("speed_hz negative", WAVE, wave(speed_hz=-1.0), "speed_negative", None, None),
    ("speed absurd", SPEED, dumps({"ts": NOW, "rpm": 1e7}), "speed_absurd", None, None),
    ("speed beyond a double", SPEED, b'{"ts": 1780000000.0, "hz": 1e400}', "speed_absurd", None, None),
    ("speed_rpm absurd", WAVE, wave(speed_rpm=500_000), "speed_absurd", None, None),
    # once-per-revolution pulses: 256 samples at 25.6 kHz last 0.01 s (docs/mqtt.md)
    ("pulses string", WAVE, wave(once_per_rev_s="0.001,0.002"), "once_per_rev_invalid", None, None),
    ("pulses object", WAVE, wave(once_per_rev_s={"0": 0.001}), "once_per_rev_invalid", None, None),
    ("pulses boolean", WAVE, wave(once_per_rev_s=[0.001, True]), "once_per_rev_invalid", None, None),
    ("pulses numeric strings", WAVE, wave(once_per_rev_s=["0.001"]), "once_per_rev_invalid", None, None),
    ("pulses null inside", WAVE, wave(once_per_rev_s=[0.001, None]), "once_per_rev_invalid", None, None),
    ("pulses nested", WAVE, wave(once_per_rev_s=[[0.001]]), "once_per_rev_invalid", None, None),
    ("pulses NaN", WAVE, raw_wave('"samples_f32": "' + f32_b64([0.5] * 256) + '", "once_per_rev_s": [NaN]'),
     "once_per_rev_invalid", None, None),
    ("pulses huge integer", WAVE, wave(once_per_rev_s=[10**400]), "once_per_rev_invalid", None, None),
    ("pulses decreasing", WAVE, wave(once_per_rev_s=[0.005, 0.002]), "once_per_rev_invalid", None, None),
    ("pulse before the block", WAVE, wave(once_per_rev_s=[-0.001, 0.002]), "once_per_rev_invalid", None, None),
    ("pulse after the block", WAVE, wave(once_per_rev_s=[0.002, 0.0101]), "once_per_rev_invalid", None, None),
    ("too many pulses", WAVE, wave(once_per_rev_s=[0.001, 0.002, 0.003, 0.004]), "once_per_rev_invalid",
     IngestLimits(max_once_per_rev_pulses=3), None),
    ("id number", WAVE, wave(id=42), "id_invalid", None, None),
    ("id empty", WAVE, wave(id=""), "id_invalid", None, None),
    ("id too long", WAVE, wave(id="x" * 500), "id_invalid", None, None),
]


def _decode(topic, payload, limits=None, last_ts=None):
    return decode_message(
        topic, payload, REGISTRY, now=NOW, last_ts=last_ts, limits=limits or IngestLimits()
    )


class TestRejections:
    @pytest.mark.parametrize(
        ("topic", "payload", "reason", "limits", "last_ts"),
        [pytest.param(*case[1:], id=case[0]) for case in CORPUS],
    )
    def test_rejected_with_reason(self, topic, payload, reason, limits, last_ts):
        with pytest.raises(Rejected) as info:
            _decode(topic, payload, limits, last_ts)
        assert info.value.reason == reason, info.value.detail
        assert info.value.detail.endswith(".")

    def test_corpus_reaches_every_reason(self):
        covered = {case[3] for case in CORPUS}
        assert covered == set(REJECTION_REASONS)
        assert len(REJECTION_REASONS) >= 30  # issue 4: at least 30 kinds of bad input

    def test_every_reason_is_documented(self):
        text = DOCS.read_text(encoding="utf-8").split("\n## Rejections\n")[1].split("\n## ")[0]
        documented = set(re.findall(r"^\| `([a-z0-9_]+)` \|", text, flags=re.M))
        assert documented == set(REJECTION_REASONS)

    def test_unknown_reason_is_refused(self):
        with pytest.raises(ValueError, match="REJECTION_REASONS"):
            Rejected("something_else", "x.")

    def test_random_mutations_only_reject(self):
        # Whatever bytes arrive, the decoder answers with a reading or a Rejected, never a crash.
        rng = random.Random(20260528)
        seeds = [wave(), dumps(good_wave(samples_f32=DROP, samples=LIST64)),
                 dumps({"ts": NOW, "rpm": 1500})]
        outcomes = set()
        for i in range(600):
            data = bytearray(seeds[i % 3])
            for _ in range(rng.randint(1, 4)):
                pos = rng.randrange(len(data))
                op = rng.random()
                if op < 0.4:
                    data[pos] = rng.randrange(256)
                elif op < 0.7:
                    del data[pos : pos + rng.randint(1, 8)]
                else:
                    data[pos:pos] = rng.choice([b"NaN", b"-", b"[", b"}", b'"', b"1e999", b"\\u0000"])
            topic = SPEED if i % 3 == 2 else WAVE
            try:
                _decode(topic, bytes(data))
                outcomes.add("ok")
            except Rejected as exc:
                outcomes.add(exc.reason)
        assert len(outcomes) > 5


class TestGoodPayloads:
    def test_f32_values_round_trip_exactly(self):
        values = np.random.default_rng(7).normal(0, 3.0, 16384).astype(np.float32)
        raw = values.astype("<f4").tobytes()
        payload = dumps(good_wave(samples_f32=base64.b64encode(raw).decode("ascii")))
        w = _decode(WAVE, payload)
        assert isinstance(w, Waveform)
        # IEEE 754 little-endian float32 as the stdlib reads it (struct, RFC 4648 base64)
        expected = struct.unpack(f"<{len(values)}f", base64.b64decode(base64.b64encode(raw)))
        assert w.samples.dtype == np.float64
        assert w.samples.tolist() == list(expected)
        assert (w.machine, w.point, w.fs_hz, w.unit) == ("fan-1", "de-h", 25600.0, "m/s^2")

    def test_json_list_values_round_trip_exactly(self):
        values = [0.1, -2.5, 1e-300, 123456789.125, 0, -7, 3.0e8] * 20  # large, within the plausible magnitude
        w = _decode(WAVE, dumps(good_wave(samples_f32=DROP, samples=values)))
        # json.dumps writes repr(float), which reads back to the same double (Python float repr)
        assert w.samples.tolist() == [float(v) for v in values]

    def test_iso_times_with_zones(self):
        expected = calendar.timegm((2026, 5, 28, 9, 0, 0))
        assert _decode(WAVE, wave(ts="2026-05-28T09:00:00Z")).ts == expected
        assert _decode(WAVE, wave(ts="2026-05-28T09:00:00.250+00:00")).ts == expected + 0.25
        # 11:00 at UTC+02:00 is 09:00 UTC (ISO 8601 offsets)
        assert _decode(WAVE, wave(ts="2026-05-28T11:00:00+02:00")).ts == expected

    def test_epoch_seconds(self):
        assert _decode(WAVE, wave(ts=int(NOW) - 60)).ts == NOW - 60

    def test_speed_payloads(self):
        # 1 r/min = 1/60 rev/s (definition)
        r = _decode(SPEED, dumps({"ts": NOW, "rpm": 1500}))
        assert r == SpeedReading(machine="fan-1", ts=NOW, speed_hz=25.0)
        assert _decode(SPEED, dumps({"ts": NOW, "hz": 24.5})).speed_hz == 24.5
        # a stopped machine is a valid reading
        assert _decode(SPEED, dumps({"ts": NOW, "rpm": 0})).speed_hz == 0.0

    def test_waveform_speed_and_id(self):
        w = _decode(WAVE, wave(speed_rpm=2970, id="r-0001"))
        assert w.speed_hz == pytest.approx(49.5, rel=0, abs=1e-12)  # 2970 r/min / 60 (definition)
        assert w.reading_id == "r-0001"
        assert _decode(WAVE, wave(speed_hz=12.5)).speed_hz == 12.5
        assert _decode(WAVE, wave()).speed_hz is None

    def test_once_per_rev_pulses(self):
        # repr(float) in json.dumps reads back to the same double (Python float repr)
        times = [0.0, 0.0012345678901234, 0.0051, 0.0051, 0.01]  # 256 / 25600 Hz = 0.01 s
        w = _decode(WAVE, wave(once_per_rev_s=times))
        assert w.once_per_rev_s.dtype == np.float64
        assert w.once_per_rev_s.tolist() == times  # a repeated time is kept, the end included
        assert _decode(WAVE, wave(once_per_rev_s=[])).once_per_rev_s.size == 0
        # old payloads, and null, carry no pulse input
        assert _decode(WAVE, wave()).once_per_rev_s is None
        assert _decode(WAVE, wave(once_per_rev_s=None)).once_per_rev_s is None

    def test_pulse_rejections_are_one_sentence_naming_the_value(self):
        for body, words in (
            (wave(once_per_rev_s=[0.005, 0.002]), ("pulse 1", "0.002 s")),
            (wave(once_per_rev_s=[0.002, 0.5]), ("0 to 0.01 s", "0.5 s")),
            (wave(once_per_rev_s=[0.001, "x"]), ("once_per_rev_s[1]", "'x'")),
        ):
            with pytest.raises(Rejected) as info:
                _decode(WAVE, body)
            detail = info.value.detail
            assert detail.count(". ") == 0 and detail.endswith(".")
            assert all(w in detail for w in words), detail

    def test_other_unit_of_same_quantity_passes(self):
        assert _decode(WAVE, wave(unit="g")).unit == "g"
        assert _decode("whirlwatch/fan-1/shaft-x/waveform", wave(unit="mil")).unit == "mil"

    def test_sample_rate_other_than_registered_passes(self):
        # a wrong sample rate is a sensor fault for sensor health, not a rejected message
        assert _decode(WAVE, wave(fs=10000)).fs_hz == 10000.0

    def test_redelivery_and_small_reordering_pass(self):
        # equal ts = a redelivered message: left to the idempotent insert
        assert _decode(WAVE, wave(ts=NOW - 10), last_ts=lambda m, p: NOW - 10).ts == NOW - 10
        assert _decode(WAVE, wave(ts=NOW - 70), last_ts=lambda m, p: NOW - 10).ts == NOW - 70
        seen = []
        _decode(WAVE, wave(), last_ts=lambda m, p: seen.append((m, p)))
        assert seen == [("fan-1", "de-h")]

    def test_extra_keys_are_ignored(self):
        assert _decode(WAVE, wave(gateway="g-7")).point == "de-h"

    def test_stream_payload_round_trip(self):
        # What the stream files write (monitor.io.streams) decodes to the same reading, with
        # the samples as float32 base64 or as a list of numbers.
        w = _decode(WAVE, wave(speed_hz=20.0, id="a", once_per_rev_s=[0.001, 0.006]))
        f32 = waveform_payload(w)
        plain = {k: v for k, v in f32.items() if k != "samples_f32"} | {"samples": w.samples.tolist()}
        for body in (f32, plain):
            again = _decode(WAVE, dumps(body))
            assert again.samples.tolist() == w.samples.tolist()
            assert (again.ts, again.fs_hz, again.speed_hz, again.reading_id) == (
                w.ts, w.fs_hz, 20.0, "a"
            )
            assert again.once_per_rev_s.tolist() == [0.001, 0.006]

    def test_custom_prefix(self):
        assert parse_topic("plant/a/whirlwatch/fan-1/speed", "plant/a/whirlwatch") == (
            "fan-1", None, "speed"
        )
        r = decode_message(
            "site2/fan-1/speed", dumps({"ts": NOW, "hz": 3}), REGISTRY, prefix="site2", now=NOW
        )
        assert r.speed_hz == 3.0


class TestLimits:
    def test_bad_limits(self):
        with pytest.raises(ValueError, match="min_samples"):
            IngestLimits(min_samples=0)
        with pytest.raises(ValueError, match="max_age_s"):
            IngestLimits(max_age_s=-1)
        with pytest.raises(ValueError, match="min_fs_hz"):
            IngestLimits(min_fs_hz=10, max_fs_hz=5)


class TestCounting:
    def test_logs_once_per_reason_per_interval(self):
        c = RejectionCounter(interval_s=60)
        assert c.record("not_json", 0.0) is True
        assert c.record("not_json", 10.0) is False
        assert c.record("not_json", 59.9) is False
        assert c.record("fs_absurd", 20.0) is True
        assert c.take_suppressed("not_json") == 2
        assert c.take_suppressed("not_json") == 0
        assert c.record("not_json", 60.0) is True
        assert c.counts() == {"not_json": 4, "fs_absurd": 1}
        assert c.total == 5
