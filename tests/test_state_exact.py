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
from pathlib import Path

import pytest
from fixtures_db import fresh_database
from service_helpers import PLANT, measurement_count, plant_store
from sqlalchemy import select

from monitor.alarms import AlarmEngine, AlarmKey
from monitor.config import load_settings
from monitor.detection import MachineEvaluator, evaluator_from_state, stored_state
from monitor.growth import Baseline, TrendWindow
from monitor.registry import load_registry
from monitor.replay import load_streams
from monitor.service import Service
from monitor.store import Store
from monitor.store.models import DetectorState
from monitor.store.writes import save_detector_states
from monitor.streams import iso_utc

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
        svc._stop.set()  # the retry loop gives up once the service is stopping
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
    import time

    t0 = float(int(time.time())) - 120.0
    first = restamped("sp-2", 0, 30, t0)
    later = restamped("sp-2", 30, 45, t0 + 30)
    svc = Service(settings_for(plant_url), stale_check_s=0)
    try:
        handle_within(svc, first)
        fits = [w["fit"] for _, _, w in svc._evaluators["sp-2"].snapshot()["trends"] if w["fit"]]
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
    line = w.line()
    assert line is not None and math.isnan(line[1])
    back = through_store(plant_url, "sp-2", {"window": w.snapshot()})
    w2 = TrendWindow.restore(back["window"])
    w.add(1010.0, 2.5)
    w2.add(1010.0, 2.5)
    assert same(list(w2.line()), list(w.line()))
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
