"""What people see follows the speed stream, and trends mark what sensor health flagged:
readings go in through the service's batch path (no broker), the API is read through the
Flask test client, on real SQLite and PostgreSQL stores (docs/api.md, "Running speed" and
"Trends").

The machines are invented: a motor with one accelerometer next to a 30 Hz frame mode
(damping ratio 0.05) and a speed topic (a tach), and a pump without one."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pytest
from fixtures_db import fresh_database
from service_helpers import message, offline_service

from dashboard import create_app
from monitor.model.readings import SpeedReading, Waveform
from monitor.model.registry import Machine, Mode, Point, Registry
from monitor.service.items import OutcomeKind
from monitor.store import Store, import_registry, upgrade
from monitor.store.auth import create_api_token, create_user

BACKENDS = ["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)]
FS_HZ = 2560.0
N = 4096
MODE_HZ = 30.0
ZETA = 0.05
T0 = dt.datetime(2026, 6, 1, 6, 0, tzinfo=dt.UTC).timestamp()
STEP_S = 60.0


def plant() -> Registry:
    accel = (Point(id="de-h", direction="horizontal", quantity="acceleration", unit="m/s^2", fs_hz=FS_HZ),)
    return Registry(machines=(
        Machine(id="mot-t", name="Tach motor", location="test bay", machine_class="group2/rigid",
                speed_range_rpm=(600.0, 3000.0), excitation_orders=(1.0, 2.0), points=accel,
                modes=(Mode(name="frame", frequency_hz=MODE_HZ, damping_ratio=ZETA),)),
        Machine(id="pmp-s", name="Spiky pump", location="test bay", machine_class="group2/rigid",
                speed_range_rpm=(1200.0, 1800.0), excitation_orders=(1.0, 2.0), points=accel),
    ))


def waveform(machine: str, ts: float, speed_hz: float | None, seed: int, *, dead: bool = False,
             spikes: bool = False) -> Waveform:
    """A 1x sinusoid (2 m/s^2 peak) with a little noise; ``dead``: the block of a failed
    accelerometer (a constant, no speed); ``spikes``: five samples knocked to 400 m/s^2."""
    if dead:
        return Waveform(machine, "de-h", ts, FS_HZ, "m/s^2", np.full(N, 0.02), reading_id=f"{machine}-{seed}")
    t = np.arange(N) / FS_HZ
    x = 2.0 * np.sin(2 * np.pi * (speed_hz or 25.0) * t) + np.random.default_rng(seed).normal(0.0, 0.02, N)
    if spikes:
        x[[500, 1500, 2500, 3000, 3500]] = 400.0
    return Waveform(machine, "de-h", ts, FS_HZ, "m/s^2", x, speed_hz=speed_hz, reading_id=f"{machine}-{seed}")


@pytest.fixture(params=BACKENDS)
def store_url(request, tmp_path):
    with fresh_database(request.param, tmp_path) as url:
        upgrade(url)
        store = Store.open(url)
        with store.transaction() as s:
            import_registry(s, plant())
            create_user(s, "vic", "viewer-pass-123", "viewer")
        store.close()
        yield url


def api(url: str):
    """A GET for the API with a viewer's token (the answer's JSON)."""
    store = Store.open(url)
    with store.transaction() as s:
        token = create_api_token(s, "vic")
    store.close()
    app = create_app({"DATABASE_URL": url, "SECRET_KEY": "test", "TESTING": True})
    client = app.test_client()

    def get(path: str) -> dict:
        r = client.get(path, headers={"Authorization": f"Bearer {token}"})
        assert r.status_code == 200, r.get_data(as_text=True)
        return r.get_json()

    return app, get


def separation_margin_pct(f_exc: float, f_mode: float) -> float:
    """API 684 separation margin, % of the mode frequency (docs/alarms.md)."""
    return abs(f_exc - f_mode) / f_mode * 100.0


def api684_required_pct(af: float, mode_above_excitation: bool) -> float:
    """API Standard 684 (from memory): mode below the running excitation
    SM = min(16, 17 (1 - 1/(AF - 1.5))) %, mode above SM = min(26, 10 + 17 (1 - 1/(AF - 1.5))) %."""
    core = 17.0 * (1.0 - 1.0 / (af - 1.5))
    return min(26.0, 10.0 + core) if mode_above_excitation else min(16.0, core)


def test_dead_accelerometer_with_live_speed_stream(store_url):
    svc = offline_service(store_url, clock=lambda: T0 + 3600.0)
    outs = []
    try:
        # Healthy at 40 Hz (1x 33 % above the mode, clear), the tach reporting first.
        for k in range(3):
            ts = T0 + STEP_S * k
            outs = svc.handle_batch([message(SpeedReading("mot-t", ts, 40.0)), message(waveform("mot-t", ts, 40.0, k))])
        # The accelerometer fails (flat blocks, no speed), the drive slows to 27 Hz: 1x 10 %
        # below the frame mode. Only the speed topic knows.
        dead_at = [T0 + STEP_S * k for k in range(3, 8)]
        for k, ts in enumerate(dead_at):
            outs = svc.handle_batch([message(SpeedReading("mot-t", ts, 27.0)),
                                     message(waveform("mot-t", ts, None, 10 + k, dead=True))])
        # Then the speed topic alone (the sensor's channel gone), 27.5 Hz.
        last = dead_at[-1] + STEP_S
        outs = svc.handle_batch([message(SpeedReading("mot-t", last, 27.5))])
    finally:
        svc.store.close()
    assert [o.kind for o in outs] == [OutcomeKind.SPEED]

    # Expected from the standard: AF = 1/(2 zeta) (half-power bandwidth, Thomson, Theory of
    # Vibration with Applications); at 27.5 Hz 1x lies below the mode (the mode above the
    # excitation), 2x = 55 Hz above it.
    af = 1.0 / (2.0 * ZETA)
    speed = 27.5
    expected = {
        "1x": (separation_margin_pct(speed, MODE_HZ), api684_required_pct(af, True)),
        "2x": (separation_margin_pct(2 * speed, MODE_HZ), api684_required_pct(af, False)),
    }
    assert expected["1x"][0] == pytest.approx(100 / 12)  # |27.5 - 30| / 30
    assert expected["1x"][1] == pytest.approx(25.0)  # AF 10: 10 + 17 (1 - 1/8.5)
    assert expected["2x"][1] == pytest.approx(15.0)  # AF 10: 17 (1 - 1/8.5)

    # The retained status of the last (speed-only) batch: the tach's speed, its margin.
    status = outs[0].status
    assert status is not None and status["speed_hz"] == speed
    assert status["nearest_margin"]["subject"] == "frame@1x"
    assert status["nearest_margin"]["margin_pct"] == pytest.approx(expected["1x"][0])
    assert status["nearest_margin"]["required_pct"] == pytest.approx(expected["1x"][1])
    assert status["ts"] == dt.datetime.fromtimestamp(last, dt.UTC).isoformat().replace("+00:00", "Z")

    app, get = api(store_url)
    try:
        # A sensor fault and a resonance alarm, each raised on its own.
        alarms = get("/api/v1/alarms?machine=mot-t&state=open")["items"]
        kinds = {(a["kind"], a["subject"]) for a in alarms}
        assert ("sensor_fault", "flat_line") in kinds and ("resonance_proximity", "frame@1x") in kinds

        m = get("/api/v1/machines/mot-t")
        assert m["speed_hz"] == speed and m["speed_rpm"] == pytest.approx(speed * 60.0)
        assert m["speed_source"] == "speed_topic"
        assert m["speed_at"] == dt.datetime.fromtimestamp(last, dt.UTC).isoformat().replace("+00:00", "Z")
        rows = {r["excitation"]: r for r in m["margins"]}
        assert set(rows) == {"1x", "2x"}
        for label, (margin, required) in expected.items():
            assert rows[label]["excitation_hz"] == pytest.approx(float(label[0]) * speed)
            assert rows[label]["margin_pct"] == pytest.approx(margin)
            assert rows[label]["required_pct"] == pytest.approx(required)
        assert rows["1x"]["status"] == "inside"

        (summary,) = [x for x in get("/api/v1/machines")["items"] if x["id"] == "mot-t"]
        assert summary["speed_hz"] == speed and summary["speed_source"] == "speed_topic"
        assert summary["nearest_margin"]["excitation"] == "1x"
        assert summary["nearest_margin"]["margin_pct"] == pytest.approx(expected["1x"][0])
        assert summary["nearest_margin"]["required_pct"] == pytest.approx(expected["1x"][1])

        # The resonance map's speed runs on through the sensor's failure to the last speed.
        tr = get(f"/api/v1/machines/mot-t/trends?from={T0 - 1}&to={last + 1}")
        sp = tr["speed"]
        assert sp["ts"] == pytest.approx([T0 + STEP_S * k for k in range(8)] + [last])
        assert sp["speed_hz"] == [40.0] * 3 + [27.0] * 5 + [27.5]
        assert set(sp["source"]) == {"speed_topic"}
        # The dead blocks are in the point's trend, marked with what sensor health found.
        (pt,) = tr["points"]
        assert [f for f in pt["flags"]] == [[]] * 3 + [["flat_line"]] * 5
    finally:
        app.extensions["whirlwatch_engine"].dispose()


def test_trends_mark_spike_flagged_readings(store_url):
    svc = offline_service(store_url, clock=lambda: T0 + 3600.0)
    spiky = 5
    try:
        for k in range(10):
            out = svc.handle_batch([message(waveform("pmp-s", T0 + STEP_S * k, 24.75, k, spikes=k == spiky))])
            assert out[0].kind == OutcomeKind.WAVEFORM
    finally:
        svc.store.close()
    app, get = api(store_url)
    try:
        window = f"from={T0 - 1}&to={T0 + 10 * STEP_S}"
        (p,) = get(f"/api/v1/machines/pmp-s/trends?{window}&max_points=100")["points"]
        assert p["returned"] == 10
        # Spikes: a few samples more than 25 robust standard deviations from the median
        # (docs/alarms.md, sensor_fault; common practice).
        assert p["flags"] == [["spikes"] if k == spiky else [] for k in range(10)]
        # The spikes carry energy the machine does not have: the flagged level stands out,
        # which is why it is marked and never drawn as the trend.
        accepted = [v for k, v in enumerate(p["overall_mm_s_rms"]) if k != spiky]
        assert p["overall_mm_s_rms"][spiky] > 2 * max(accepted)
        # Decimated to 5 buckets of two readings: the largest accepted level of each bucket
        # is kept, the flagged reading never stands in for its bucket's accepted one.
        (d,) = get(f"/api/v1/machines/pmp-s/trends?{window}&max_points=5")["points"]
        assert d["returned"] == 5 and all(f == [] for f in d["flags"])
        assert T0 + STEP_S * spiky not in d["ts"]
        # The resonance map's speed leaves it out too (the detector does not use its speed).
        sp = get(f"/api/v1/machines/pmp-s/trends?{window}")["speed"]
        assert sp["ts"] == pytest.approx([T0 + STEP_S * k for k in range(10) if k != spiky])
        assert set(sp["source"]) == {"measured"}
    finally:
        app.extensions["whirlwatch_engine"].dispose()
