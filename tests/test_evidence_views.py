"""The evidence views of the API (dashboard/evidence_api.py) and the pure code behind them:
the envelope spectrum of a stored waveform with its bearing defect markers, a point's
waterfall, a spectrum against its baseline, the sweep plots of a passage. Data stored
through the service's batch path on real SQLite (PostgreSQL where marked)."""

from __future__ import annotations

import json
import math
import time
from pathlib import Path

import numpy as np
import pytest
from dashboard_seed import PASSWORDS
from evidence_plant import (
    ANGLE_DEG,
    BALL_MM,
    FS_HZ,
    MACHINE,
    N_BALLS,
    PITCH_MM,
    POINT,
    SHAFT_HZ,
    N,
    bpfo_hz,
    login,
    outer_race_samples,
    registry,
    store_with_readings,
)
from fixtures_db import fresh_database
from passage_run import FN_HZ, feed, machine, run_messages, store_with
from service_helpers import message, offline_service
from sqlalchemy import select

from dashboard import create_app
from monitor.analysis.envelope_view import defect_markers, envelope_view
from monitor.model.bearing_geometry import BearingGeometry
from monitor.model.bounds import ID_PATTERN
from monitor.model.readings import Waveform
from monitor.modes.sweep_plots import crossing_hz, sweep_plot
from monitor.store import Store, import_registry, upgrade
from monitor.store.auth import create_user
from monitor.store.models import Measurement, SpectrumSnapshot, WaveformSnapshot

BACKENDS = ["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)]
GEOMETRY = BearingGeometry(N_BALLS, BALL_MM, PITCH_MM, ANGLE_DEG)


def kinematic_hz(fr: float) -> dict[str, float]:
    """The kinematic defect frequencies, outer race fixed (T. A. Harris, *Rolling Bearing
    Analysis*, 4th ed., ch. 8; Randall and Antoni 2011, eqs. 1-4)."""
    c = BALL_MM / PITCH_MM * math.cos(math.radians(ANGLE_DEG))
    return {"ftf": fr / 2 * (1 - c), "bpfo": N_BALLS * fr / 2 * (1 - c), "bpfi": N_BALLS * fr / 2 * (1 + c),
            "bsf": PITCH_MM * fr / (2 * BALL_MM) * (1 - c * c)}


def test_markers_at_the_kinematic_bearing_frequencies():
    fr = SHAFT_HZ
    want = kinematic_hz(fr)
    markers = defect_markers(GEOMETRY.frequencies_hz(fr), fr)
    for defect, f in want.items():
        for k in (1, 2, 3):
            (m,) = [m for m in markers if m.defect == defect and m.harmonic == k]
            assert m.hz == pytest.approx(k * f, rel=1e-12)
    side = sorted(m.hz for m in markers if m.harmonic == 0)
    assert side == pytest.approx([want["bpfi"] - fr, want["bpfi"] + fr], rel=1e-12)
    # 6205 defect orders as commonly tabulated: BPFO 3.585, BPFI 5.415, BSF 2.357, FTF
    # 0.398 x shaft speed (from memory)
    orders = {m.defect: m.hz / fr for m in markers if m.harmonic == 1}
    assert orders == pytest.approx({"bpfo": 3.585, "bpfi": 5.415, "bsf": 2.357, "ftf": 0.398}, abs=2e-3)


def test_envelope_of_an_outer_race_defect_peaks_at_bpfo():
    view = envelope_view(outer_race_samples(1), FS_HZ, "m/s^2", SHAFT_HZ, GEOMETRY)
    f, a = np.asarray(view["freq_hz"]), np.asarray(view["amplitude"])
    above = f > 2 * view["resolution_hz"]
    peak_hz = f[above][np.argmax(a[above])]
    # Impacts at BPFO modulate the ringing at BPFO: the envelope's largest line is BPFO
    # (Randall and Antoni 2011, section 3), within the 1 % slip and one bin.
    assert peak_hz == pytest.approx(bpfo_hz(), abs=0.01 * bpfo_hz() + view["resolution_hz"])
    assert view["frequencies_hz"]["bpfo"] == pytest.approx(kinematic_hz(SHAFT_HZ)["bpfo"], rel=1e-12)
    # the chosen demodulation band holds the struck resonance
    lo, hi = view["band_hz"]
    assert lo <= 4000.0 <= hi
    assert view["indicator_db"]["bpfo"] > 15.0 > view["indicator_db"]["bpfi"]


@pytest.fixture(params=BACKENDS)
def stored(request, tmp_path):
    """Six defect blocks a minute apart (every one keeps its spectra and waveform), and a
    dashboard client signed in as a viewer."""
    with fresh_database(request.param, tmp_path) as url:
        store_with_readings(url, time.time() - 60.0, 6, spectra_snapshot_interval_s=30,
                            spectra_waveform_interval_s=30)
        app = create_app({"DATABASE_URL": url, "SECRET_KEY": "test", "TESTING": True})
        client = app.test_client()
        login(client)
        yield url, client
        app.extensions["whirlwatch_engine"].dispose()


def rows_of(url: str, model):
    store = Store.open(url)
    try:
        with store.session() as s:
            out = list(s.scalars(select(model).order_by(model.ts, model.id)))
            s.expunge_all()
            return out
    finally:
        store.close()


def test_waveform_and_its_envelope_through_the_api(stored):
    url, client = stored
    listed = client.get(f"/api/v1/machines/{MACHINE}/waveforms?point={POINT}").get_json()["items"]
    kept = rows_of(url, WaveformSnapshot)
    assert [w["id"] for w in listed] == [w.id for w in reversed(kept)]  # newest first
    w = client.get(f"/api/v1/waveforms/{kept[-1].id}").get_json()
    # exact to float32: the JSON carries the stored float32 values (IEEE 754 binary32)
    assert np.array_equal(np.asarray(w["samples"], dtype=np.float32), kept[-1].sample_array())
    assert (w["fs_hz"], w["unit"], w["n_samples"]) == (FS_HZ, "m/s^2", kept[-1].n_samples)
    env = client.get(f"/api/v1/waveforms/{kept[-1].id}/envelope").get_json()
    want = kinematic_hz(SHAFT_HZ)
    first = {m["defect"]: m["hz"] for m in env["markers"] if m["harmonic"] == 1}
    assert first == pytest.approx(want, rel=1e-9)  # Harris; Randall and Antoni 2011
    f, a = np.asarray(env["freq_hz"]), np.asarray(env["amplitude"])
    above = f > 2 * env["resolution_hz"]
    assert f[above][np.argmax(a[above])] == pytest.approx(want["bpfo"], abs=0.01 * want["bpfo"] + env["resolution_hz"])


def test_envelope_of_an_unknown_waveform_is_not_found(stored):
    _, client = stored
    r = client.get("/api/v1/waveforms/999999/envelope")
    assert r.status_code == 404


def test_waterfall_rows_are_the_stored_spectra(stored):
    url, client = stored
    spectra = [s for s in rows_of(url, SpectrumSnapshot) if s.kind == "velocity"]
    meas = {m.ts: m.speed_hz for m in rows_of(url, Measurement)}
    wf = client.get(f"/api/v1/machines/{MACHINE}/waterfall?point={POINT}&kind=velocity&max_bins=65536").get_json()
    assert wf["stored"] == len(spectra) == len(wf["rows"]) == 6
    assert wf["bin_group"] == 1
    np.testing.assert_allclose(wf["freq_hz"], spectra[-1].freq_hz(), atol=1e-4)
    for row, sn in zip(wf["rows"], spectra, strict=True):
        assert row["id"] == sn.id
        assert row["speed_hz"] == meas[sn.ts]
        # amplitudes are written to 5 significant digits (reads/spectra.py)
        np.testing.assert_allclose(row["amplitude"], sn.amplitude_array(), rtol=5e-5, atol=1e-30)
    # fewer rows asked for: evenly spread, first and last kept
    two = client.get(f"/api/v1/machines/{MACHINE}/waterfall?point={POINT}&max_rows=2").get_json()
    assert [r["id"] for r in two["rows"]] == [spectra[0].id, spectra[-1].id]
    # thinned bins: each the largest of its bucket of the stored spectrum
    thin = client.get(f"/api/v1/machines/{MACHINE}/waterfall?point={POINT}&max_bins=1000").get_json()
    k = thin["bin_group"]
    amp = spectra[0].amplitude_array()
    want = amp[: amp.size // k * k].reshape(-1, k).max(axis=1)
    np.testing.assert_allclose(thin["rows"][0]["amplitude"], want, rtol=5e-5)


def test_compare_now_against_baseline(stored):
    url, client = stored
    spectra = [s for s in rows_of(url, SpectrumSnapshot) if s.kind == "velocity"]
    c = client.get(f"/api/v1/machines/{MACHINE}/compare?point={POINT}").get_json()
    # no baseline restart applied: the baseline is the point's first stored spectrum
    assert (c["now"]["id"], c["baseline"]["id"], c["baseline_since"]) == (spectra[-1].id, spectra[0].id, None)
    chosen = client.get(f"/api/v1/machines/{MACHINE}/compare?point={POINT}&now={spectra[2].id}").get_json()
    assert chosen["now"]["id"] == spectra[2].id
    assert client.get(f"/api/v1/machines/{MACHINE}/compare?point=nope").status_code == 404
    assert client.get(f"/api/v1/machines/{MACHINE}/compare").status_code == 400


def sdof_points(fn_hz: float, zeta: float, offset_deg: float) -> list[dict]:
    """Bode points of a rotating unbalance on one mode: amplitude r^2 / |1 - r^2 + 2i zeta r|,
    lag atan2(2 zeta r, 1 - r^2) plus a constant offset (W. T. Thomson, *Theory of
    Vibration with Applications*, rotating unbalance)."""
    out = []
    for f in np.linspace(0.6 * fn_hz, 1.5 * fn_hz, 181):
        r = f / fn_hz
        amp = r * r / abs(complex(1 - r * r, 2 * zeta * r))
        lag = math.degrees(math.atan2(2 * zeta * r, 1 - r * r))
        out.append({"ts": "x", "speed_hz": float(f), "amplitude": amp, "phase_deg": lag + offset_deg})
    return out


def test_sweep_plot_phase_passes_90_at_the_natural_frequency():
    pts = sdof_points(20.0, 0.02, 37.0)
    plot = sweep_plot(pts)
    assert plot.speed_hz == [p["speed_hz"] for p in pts] and plot.amplitude == [p["amplitude"] for p in pts]
    # the lag is 90 degrees at r = 1 whatever the damping (single degree of freedom); the
    # change from 0.6 fn holds the lag there (atan2(0.024, 0.64) = 2.1 degrees), hence
    # the crossing sits a little above fn: 1 - r^2 = 2 zeta r tan(2.1 deg) -> r = 1.0007
    assert plot.phase_90_hz == pytest.approx(20.0, rel=2e-3)
    np.testing.assert_allclose(np.hypot(plot.polar_x, plot.polar_y), plot.amplitude, rtol=1e-12)
    assert crossing_hz([1.0, 2.0], [0.0, -100.0], 90.0) == pytest.approx(1.9)
    assert sweep_plot([{**p, "phase_deg": None} for p in pts]).phase_90_hz is None


def test_sweep_plot_of_a_stored_passage(tmp_path):
    with fresh_database("sqlite", tmp_path) as url:
        feed(store_with(url, machine()), run_messages())
        app = create_app({"DATABASE_URL": url, "SECRET_KEY": "test", "TESTING": True})
        store = Store.open(url)
        try:
            with store.transaction() as s:
                create_user(s, "vic", PASSWORDS["vic"], "viewer")
        finally:
            store.close()
        client = app.test_client()
        login(client)
        base = "/api/v1/machines/fan-9/passages"
        passages = client.get(base).get_json()["items"]
        assert passages
        for p in passages:
            sw = client.get(f"{base}/{p['id']}/sweep").get_json()
            assert sw["speed_hz"] == [q["speed_hz"] for q in p["points"]]
            assert sw["amplitude"] == [q["amplitude"] for q in p["points"]]
            assert sw["phase_deg"] == [q["phase_deg"] for q in p["points"]]
            assert sw["natural_frequency_hz"] == p["natural_frequency_hz"]
            assert sw["amplification_factor"] == p["amplification_factor"]
            # single degree of freedom: the response lags the unbalance by 90 degrees at
            # the natural frequency (Thomson); the simulated mode is FN_HZ
            assert sw["phase_90_hz"] == pytest.approx(FN_HZ, rel=0.02)
        app.extensions["whirlwatch_engine"].dispose()


def test_the_api_description_states_the_point_as_the_registry_bounds_it():
    doc = json.loads((Path(__file__).resolve().parent.parent / "dashboard" / "openapi.json").read_text())
    for path in ("/machines/{machine_id}/waterfall", "/machines/{machine_id}/compare"):
        (point,) = [p for p in doc["paths"][path]["get"]["parameters"] if p["name"] == "point"]
        assert point["required"] and point["schema"]["pattern"] == ID_PATTERN.pattern


def test_waterfall_against_speed(tmp_path):
    # Six blocks at six speeds, stored out of speed order: with order=speed the rows are
    # the same stored spectra, ordered by the speed of their readings.
    speeds = [27.0, 29.5, 26.0, 30.0, 28.0, 29.0]
    with fresh_database("sqlite", tmp_path) as url:
        upgrade(url)
        store = Store.open(url)
        with store.transaction() as s:
            import_registry(s, registry())
            create_user(s, "vic", PASSWORDS["vic"], "viewer")
        store.close()
        t0 = time.time() - 600.0
        clock = {"now": t0}
        svc = offline_service(url, lambda: clock["now"], spectra_snapshot_interval_s=1)
        t = np.arange(N) / FS_HZ
        for i, hz in enumerate(speeds):
            clock["now"] = t0 + 10.0 * i
            svc.handle_batch([message(Waveform(MACHINE, POINT, clock["now"], FS_HZ, "m/s^2",
                                               np.sin(2 * np.pi * hz * t), speed_hz=hz))])
        svc.store.close()
        app = create_app({"DATABASE_URL": url, "SECRET_KEY": "test", "TESTING": True})
        client = app.test_client()
        login(client)
        wf = client.get(f"/api/v1/machines/{MACHINE}/waterfall?point={POINT}&order=speed").get_json()
        assert [r["speed_hz"] for r in wf["rows"]] == sorted(speeds)
        by_time = client.get(f"/api/v1/machines/{MACHINE}/waterfall?point={POINT}").get_json()
        assert [r["speed_hz"] for r in by_time["rows"]] == speeds
        assert sorted(r["id"] for r in wf["rows"]) == sorted(r["id"] for r in by_time["rows"])
        assert client.get(f"/api/v1/machines/{MACHINE}/waterfall?point={POINT}&order=x").status_code == 400
        app.extensions["whirlwatch_engine"].dispose()
