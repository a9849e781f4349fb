"""Detector state survives a restart exactly: through the store (SQLite and PostgreSQL)
and back, with NaN, infinities, -0.0, empty windows and tied values.

The reference for every check is an uninterrupted run of the same readings (the detector
is deterministic), or IEEE 754 itself (a float read back has the bits it was written with).
"""

from __future__ import annotations

import json
import math
import struct
import threading
import time
from pathlib import Path

import numpy as np
import pytest
from fixtures_db import fresh_database
from service_helpers import PLANT, measurement_count, plant_store
from sqlalchemy import select

from monitor.config import load_settings
from monitor.detection.alarms import AlarmEngine, AlarmKey
from monitor.detection.evaluator import MachineEvaluator
from monitor.detection.growth import Baseline, TrendWindow
from monitor.detection.stored_state import evaluator_from_state, stored_state
from monitor.io.replay import load_streams
from monitor.model.registry_file import load_registry
from monitor.model.timefmt import iso_utc
from monitor.service.service import Service
from monitor.store import Store
from monitor.store.models import DetectorState
from monitor.store.writes import save_detector_states

SAMPLES = PLANT.parent
BACKENDS = ["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)]


def bits(x: float) -> int:
    """The IEEE 754 binary64 bit pattern of ``x``: equal bits, equal float (NaN included)."""
    return struct.unpack("<Q", struct.pack("<d", x))[0]


def same(a, b) -> bool:
    """Equal as data, floats compared by their bits (NaN equals itself, -0.0 differs from
    0.0); lists and tuples alike (JSON has one array type)."""
    if isinstance(a, float) and isinstance(b, float):
        return bits(a) == bits(b)
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(same(a[k], b[k]) for k in a)
    if isinstance(a, list | tuple) and isinstance(b, list | tuple):
        return len(a) == len(b) and all(same(x, y) for x, y in zip(a, b, strict=True))
    return type(a) is type(b) and a == b


def through_store(url: str, machine: str, state: dict) -> dict:
    """Write ``state`` as ``machine``'s detector state row and read it back (a new engine:
    nothing cached), as a restarted service does."""
    store = Store.open(url)
    try:
        with store.transaction() as s:
            save_detector_states(s.connection(), {machine: (state, 1_780_000_000.0)})
    finally:
        store.close()
    store = Store.open(url)
    try:
        with store.session() as s:
            return s.scalar(select(DetectorState.state).where(DetectorState.machine_id == machine))
    finally:
        store.close()


@pytest.fixture(params=BACKENDS)
def plant_url(request: pytest.FixtureRequest, tmp_path: Path):
    with fresh_database(request.param, tmp_path) as url:
        plant_store(url)
        yield url


# ----------------------------------------------------------------------------- restart wedge


def restamped(machine: str, start: int, stop: int, t0: float) -> list[tuple[str, bytes]]:
    """Waveforms ``start:stop`` of one sample stream, stamped one second apart from ``t0``
    (epoch s): a replay of recorded blocks with fresh timestamps."""
    msgs = [m for m in load_streams([SAMPLES / f"{machine}.jsonl"]) if m[0].endswith("/waveform")]
    out = []
    for k, (topic, payload) in enumerate(msgs[start:stop]):
        body = dict(payload, ts=iso_utc(t0 + k))
        out.append((topic, json.dumps(body, separators=(",", ":")).encode()))
    return out


def settings_for(url: str):
    return load_settings(None, env={}, overrides={
        "broker.url": "mqtt://127.0.0.1:1", "database.url": url, "broker.client_id": "svc-state",
    })


def handle_within(svc: Service, messages: list[tuple[str, bytes]], timeout_s: float = 20.0) -> list:
    """``svc.handle_batch(messages)``, failing the test (not hanging it) when the batch does
    not finish in ``timeout_s``: a batch that keeps failing is retried for ever."""
    done: list = []
    errors: list[BaseException] = []

    def run() -> None:
        try:
            done.append(svc.handle_batch(messages))
        except BaseException as exc:  # reported below
            errors.append(exc)

    worker = threading.Thread(target=run, daemon=True)
    worker.start()
    worker.join(timeout_s)
    if worker.is_alive():
        svc.stop()  # the retry loop gives up once the service is stopping
        worker.join(30.0)
        pytest.fail(f"handle_batch did not finish within {timeout_s:g} s: it retries a failing batch")
    if errors:
        raise errors[0]
    return done[0]


def stored_evaluator(url: str, machine: str) -> dict:
    store = Store.open(url)
    try:
        with store.session() as s:
            return s.scalar(select(DetectorState.state).where(DetectorState.machine_id == machine))
    finally:
        store.close()


def test_restart_after_trend_windows_fit_goes_on(plant_url: str) -> None:
    # The bearing pump's envelope lines sit below the noise clamp at first, so their
    # prominence feature holds one value: a tied trend window, whose Theil-Sen interval
    # is undefined (Sen 1968, eq. 2.6: the variance of Kendall's S is zero), i.e. NaN.
    t0 = float(int(time.time())) - 120.0
    first = restamped("sp-2", 0, 30, t0)
    later = restamped("sp-2", 30, 45, t0 + 30)
    svc = Service(settings_for(plant_url), stale_check_s=0)
    try:
        handle_within(svc, first)
        fits = [w["fit"] for _, _, w in svc.detector("sp-2").snapshot()["trends"] if w["fit"]]
        assert fits, "no trend window was fitted: the test does not reach the case"
    finally:
        svc.stop()
    before = stored_evaluator(plant_url, "sp-2")
    # A restart: a new service on the same database takes the stored state.
    svc = Service(settings_for(plant_url), stale_check_s=0)
    try:
        outs = handle_within(svc, later)
    finally:
        svc.stop()
    assert [o.kind for o in outs] == ["waveform"] * len(later)
    assert measurement_count(plant_url) == (45, 45)
    after = stored_evaluator(plant_url, "sp-2")
    # Detection went on: the state moved on by the one batch, and its windows hold the
    # new readings.
    assert after["version"] == before["version"] + 1
    windows = {(p, f): w for p, f, w in after["evaluator"]["trends"]}
    assert windows and all(len(w["ts"]) == min(45, w["size"]) for w in windows.values())


# ----------------------------------------------------------------------------- unit round trips


def test_tied_window_round_trips_through_the_store(plant_url: str) -> None:
    # Ten equal values: the fit's interval ends are NaN (Sen 1968, eq. 2.6, zero variance).
    w = TrendWindow(size=12, min_readings=10, refit_every=5)
    for k in range(10):
        w.add(1000.0 + k, 2.5)
    trend = w.trend()
    assert trend is not None and math.isnan(trend.low_per_s)
    back = through_store(plant_url, "sp-2", {"window": w.snapshot()})
    w2 = TrendWindow.restore(back["window"])
    w.add(1010.0, 2.5)
    w2.add(1010.0, 2.5)
    assert same(list(w2.trend()), list(w.trend()))
    assert same(w2.snapshot(), w.snapshot())


def test_non_finite_and_signed_zero_values_come_back_with_their_bits(plant_url: str) -> None:
    # IEEE 754: NaN, +inf, -inf and -0.0 are values of their own; a round trip keeps them.
    specials = [math.nan, math.inf, -math.inf, -0.0, 0.0, 5e-324, 1.7976931348623157e308]
    eng = AlarmEngine(persistence=1)
    key = AlarmKey("sp-2", "de-h", "amplitude_growth", "overall")
    eng.update(key, 10.0, "alert", "alert", {"value": math.inf, "ratio": math.nan, "trend": -0.0,
                                             "note": "!nan", "parts": [math.nan, "!inf", None]})
    b = Baseline(size=5)
    for v, sp in ((1.0, math.nan), (2.0, 25.0), (-0.0, 25.0)):
        b.add(v, sp)
    state = {"engine": eng.snapshot(), "baseline": b.snapshot()}
    back = through_store(plant_url, "sp-2", state)
    eng2 = AlarmEngine.restore(back["engine"])
    b2 = Baseline.restore(back["baseline"])
    assert same(eng2.alarm(key).evidence, eng.alarm(key).evidence)
    assert same(eng2.snapshot(), eng.snapshot())
    assert same(b2.snapshot(), b.snapshot())
    for v in (3.0, 4.0):
        b.add(v, 25.0)
        b2.add(v, 25.0)
    assert same(b2.speed_hz, b.speed_hz) and b2.stats == b.stats
    w = TrendWindow(size=8, min_readings=3, speed_band=0.1)
    w.add(1.0, -0.0, math.nan)
    w2 = TrendWindow.restore(through_store(plant_url, "sp-2", {"w": w.snapshot()})["w"])
    assert same(w2.snapshot(), w.snapshot())
    for x in specials:
        e = AlarmEngine(persistence=1)
        e.update(key, 1.0, "alert", "alert", {"x": x})
        got = AlarmEngine.restore(through_store(plant_url, "sp-2", {"e": e.snapshot()})["e"])
        assert bits(got.alarm(key).evidence["x"]) == bits(x), x


def test_empty_evaluator_round_trips(plant_url: str) -> None:
    machine = load_registry(PLANT).machine("sp-2")
    ev = MachineEvaluator(machine)
    back = through_store(plant_url, "sp-2", stored_state(ev, 3))
    ev2, version = evaluator_from_state(machine, back)
    assert version == 3 and same(ev2.snapshot(), ev.snapshot())


def test_every_nan_keeps_its_bits_and_strings_keep_their_text() -> None:
    from monitor.detection.state_json import float_in, float_out, value_in, value_out

    # IEEE 754: NaNs differ by sign and payload; inf - inf gives the processor's default
    # NaN (on x86 with the sign bit set), not the 0x7ff8... that float("nan") has.
    nans = [math.nan, math.inf - math.inf, struct.unpack("<d", struct.pack("<Q", 0x7FF0000000000001))[0],
            struct.unpack("<d", struct.pack("<Q", 0xFFF8000000000123))[0]]
    for x in nans:
        text = json.loads(json.dumps(float_out(x)))
        assert bits(float_in(text)) == bits(x), text
    assert float_out(math.nan) == "!nan" and float_out(-math.inf) == "!-inf"
    words = ["!", "!!", "!nan", "!!inf", "plain", ""]
    assert value_in(json.loads(json.dumps(value_out(words)))) == words
    with pytest.raises(ValueError, match="'!infinity'"):
        value_in("!infinity")
    with pytest.raises(ValueError, match="not a number"):
        float_in("12.5")


# ----------------------------------------------------------------------------- format 1

FORMAT_1 = Path(__file__).parent / "data" / "detector_state_format1_sp-2.json"


def sample_readings(machine_id: str, start: int, stop: int) -> list:
    """(analysis, waveform) of waveforms ``start:stop`` of one sample stream, through the
    real decoding and analysis, at their recorded times."""
    from monitor.analysis.waveform import analyse_waveform
    from monitor.io.ingest import decode_message
    from monitor.io.streams import parse_ts

    registry = load_registry(PLANT)
    machine = registry.machine(machine_id)
    out = []
    for topic, payload in load_streams([SAMPLES / f"{machine_id}.jsonl"])[start:stop]:
        w = decode_message(topic, json.dumps(payload).encode(), registry, now=parse_ts(payload["ts"]) + 1.0)
        out.append((analyse_waveform(w, machine, machine.point(w.point)), w))
    return out


@pytest.mark.parametrize("backend", BACKENDS)
def test_format_1_state_is_converted_and_detection_goes_on_as_if_uninterrupted(
    backend: str, tmp_path: Path
) -> None:
    # The file is the bearing pump's state after its first 40 sample readings as format 1
    # stored it (NaN written as null, no format key): tied bearing windows hold null
    # interval ends.
    old = json.loads(FORMAT_1.read_text())
    assert "format" not in old["evaluator"] and old["version"] == 40
    assert any(w["fit"] and None in w["fit"] for _, _, w in old["evaluator"]["trends"])
    machine = load_registry(PLANT).machine("sp-2")
    readings = sample_readings("sp-2", 0, 84)
    reference = MachineEvaluator(machine)
    for a, w in readings[:40]:
        reference.evaluate(a, w)
    with fresh_database(backend, tmp_path) as url:
        plant_store(url)
        back = through_store(url, "sp-2", old)
    restored, version = evaluator_from_state(machine, back)
    assert version == 40
    # Converted on load: the same state as the uninterrupted run, to the bit, but for the
    # running judgement, which format 1 predates: the next reading makes it.
    def judged_apart(snap: dict) -> dict:
        return {k: v for k, v in snap.items() if k != "running"}

    assert same(judged_apart(restored.snapshot()), judged_apart(reference.snapshot()))
    for a, w in readings[40:]:
        got, want = restored.evaluate(a, w), reference.evaluate(a, w)
        assert same(value_out(got.to_json()), value_out(want.to_json()))
    assert same(restored.snapshot(), reference.snapshot())


def test_format_1_null_where_only_numbers_belong_is_refused() -> None:
    old = json.loads(FORMAT_1.read_text())["evaluator"]
    old["trends"][0][2]["values"][0] = None
    machine = load_registry(PLANT).machine("sp-2")
    with pytest.raises(ValueError, match=r"machine 'sp-2' \(format 1\).*values.*null"):
        MachineEvaluator.restore(machine, old)


def test_unknown_format_is_refused() -> None:
    machine = load_registry(PLANT).machine("sp-2")
    snap = dict(MachineEvaluator(machine).snapshot(), format=99)
    with pytest.raises(ValueError, match="format 99"):
        MachineEvaluator.restore(machine, snap)


# ----------------------------------------------------------------------------- property

from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

from monitor.analysis.waveform import OrderAmplitude, ReadingAnalysis, Spectrum  # noqa: E402
from monitor.detection.state_json import value_out  # noqa: E402
from monitor.model.readings import SpeedReading, Waveform  # noqa: E402
from monitor.model.registry import Machine, Mode, Point, Registry  # noqa: E402
from monitor.store import import_registry  # noqa: E402

FS = 2560.0
T0 = 1_780_000_000.0
#: A machine whose alarms come quickly: short baselines and windows, persistence 2; a
#: mode at 20 Hz for 1x and at 33 Hz for 2x near the speeds drawn below.
QUICK = Machine(
    id="pt-9", machine_class="group2/rigid", excitation_orders=(1.0, 2.0), speed_range_rpm=(300.0, 1800.0),
    modes=(Mode("pedestal", 20.0, damping_ratio=0.05), Mode("frame", 33.0, amplification_factor=8.0)),
    points=(Point("de", fs_hz=FS, unit="m/s^2"), Point("nde", fs_hz=FS, unit="m/s^2")),
    settings={"baseline_readings": 4, "trend_window": 8, "trend_min_readings": 4, "trend_refit_every": 2,
              "persistence": 2, "speed_history": 6, "approach_warning_s": 3600.0},
)
_EMPTY = Spectrum(np.zeros(2), np.zeros(2), "m/s^2", "peak", 1.0, 1.5)
_rng = np.random.default_rng(11)
#: Sample blocks for the health checks: broadband noise passes; zeros are a flat line
#: with a dropout run (tests/test_health.py); the noise at another rate fails sample_rate.
BLOCKS = {"noise": (_rng.standard_normal(512), FS), "zeros": (np.zeros(512), FS),
          "rate": (_rng.standard_normal(512), 2 * FS)}

# Values from a short list repeat (ties, NaN interval ends); the rest are drawn freely.
speeds = st.one_of(st.sampled_from([10.0, 16.5, 19.0, 20.0, 21.0, 25.0]),
                   st.floats(5.0, 30.0), st.just(math.nan))
levels = st.one_of(st.sampled_from([-0.0, 0.5, 1.0, 3.0, 6.0]), st.floats(0.0, 12.0),
                   st.sampled_from([math.nan, math.inf]))
# A reading step is repeated ``count`` times (the conditions persist, alarms follow).
readings = st.tuples(
    st.just("reading"), st.sampled_from([1, 1, 2, 3, 5]), st.sampled_from([0.0, 1.0, 600.0, 3600.0]),
    st.sampled_from(["de", "nde"]), speeds, levels, levels, st.one_of(st.none(), st.floats(0.0, 40.0)),
    st.sampled_from([None, "noise", "noise", "noise", "zeros", "rate"]))
steps = st.one_of(
    readings, readings, readings, readings,
    st.tuples(st.just("speed"), st.sampled_from([1.0, 60.0]), st.floats(5.0, 30.0)),
    st.tuples(st.just("stale"), st.sampled_from([600.0, 86400.0])),
    st.tuples(st.just("ack")),
    st.tuples(st.just("baseline"), st.sampled_from(["de", "nde"])),
    st.tuples(st.just("restart")),
)


def analysis_of(ts: float, point: str, speed: float, overall: float, one_x: float, bearing_db: float | None
                ) -> ReadingAnalysis:
    extra = {"bearing": {"indicator_db": {"bpfo": bearing_db}}} if bearing_db is not None else {}
    return ReadingAnalysis(
        machine=QUICK.id, point=point, ts=ts, speed_hz=speed, speed_source="measured", speed_uncertainty_hz=0.0,
        overall_velocity_mm_s_rms=overall,
        orders=(OrderAmplitude(1.0, speed, 0.0, one_x), OrderAmplitude(2.0, 2 * speed, 0.0, 0.3 * one_x)),
        one_x_normalised=one_x / speed**2, peaks=(), spectrum=_EMPTY, velocity_spectrum=_EMPTY,
        reading_id=f"r-{ts:.0f}-{point}", extra=extra)


def drive(history: list[tuple], restart) -> list:
    """Every output of one evaluator fed ``history``: evaluations, transitions, and the
    final snapshot, as exact JSON data. ``restart(evaluator)`` is called at each
    ``restart`` step and returns the evaluator to go on with."""
    ev = MachineEvaluator(QUICK)
    out: list = []
    ts = T0
    for step in history:
        kind = step[0]
        if kind == "reading":
            _, count, dt, point, speed, overall, one_x, db, block = step
            for _ in range(count):
                ts += dt
                w = None
                if block is not None:
                    samples, fs = BLOCKS[block]
                    w = Waveform(QUICK.id, point, ts, fs, "m/s^2", samples)
                a = analysis_of(ts, point, speed, overall, one_x, db)
                out.append(value_out(ev.evaluate(a, w).to_json()))
        elif kind == "speed":
            ts += step[1]
            out.append(value_out([t.to_json() for t in ev.observe_speed(SpeedReading(QUICK.id, ts, step[2]))]))
        elif kind == "stale":
            out.append(value_out([t.to_json() for t in ev.check_stale(ts + step[1])]))
        elif kind == "ack":
            active = [a for a in ev.active_alarms() if a["state"] == "active"]
            if active:
                out.append(value_out(ev.acknowledge(active[0]["id"], "a.lund", "seen", ts).to_json()))
        elif kind == "baseline":
            ev.restart_baseline(step[1], ts)
        else:
            ev = restart(ev)
    out.append(ev.snapshot())
    return out


@pytest.fixture(scope="module", params=BACKENDS)
def quick_url(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory):
    from monitor.store import upgrade

    with fresh_database(request.param, tmp_path_factory.mktemp("state")) as url:
        upgrade(url)
        store = Store.open(url)
        try:
            with store.transaction() as s:
                import_registry(s, Registry((QUICK,)))
        finally:
            store.close()
        yield url


@settings(max_examples=50, deadline=5000, suppress_health_check=[HealthCheck.too_slow])
@given(history=st.lists(steps, min_size=1, max_size=60))
def test_restarts_through_the_store_change_no_output(quick_url: str, history: list[tuple]) -> None:
    # The detector is deterministic: a run restarted from its stored state at any step
    # must give what the uninterrupted run gives, every evaluation and transition, to the bit.
    count = [0]

    def restart(ev: MachineEvaluator) -> MachineEvaluator:
        count[0] += 1
        back = through_store(quick_url, QUICK.id, stored_state(ev, count[0]))
        return evaluator_from_state(QUICK, back)[0]

    want = drive(history, lambda ev: ev)
    got = drive(history, restart)
    assert len(got) == len(want)
    for k, (g, w) in enumerate(zip(got, want, strict=True)):
        assert same(g, w), (k, history)
