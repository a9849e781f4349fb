"""Never invalid JSON from non-finite values: a waveform near the float32 limit is refused at
ingest (``samples_absurd``), every block within the bound gives finite stored spectra, and
the API answers standard JSON (RFC 8259 has no NaN or Infinity) even for a spectrum stored
with an infinite bin before the check existed."""

from __future__ import annotations

import base64
import json
import time
from pathlib import Path

import numpy as np
import pytest
from fixtures_db import fresh_database, make_analysis
from service_helpers import PLANT, plant_store
from sqlalchemy import func, select

from dashboard import create_app
from monitor.analysis.waveform import analyse_waveform
from monitor.config import load_settings
from monitor.io.ingest_limits import IngestLimits
from monitor.io.replay import load_streams
from monitor.model.readings import Waveform
from monitor.model.registry import Machine, Point
from monitor.model.timefmt import iso_utc
from monitor.model.units import UNITS_BY_QUANTITY
from monitor.service.service import Service
from monitor.store import Store
from monitor.store.auth import create_api_token, create_user
from monitor.store.models import DeadLetter, SpectrumSnapshot, pack_amplitudes
from monitor.store.writes import insert_many_ignore, snapshot_rows

BACKENDS = ["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)]
#: Largest finite IEEE 754 binary32 value (3.4028235e38), the store's amplitude type.
F32_MAX = float(np.finfo(np.float32).max)


def strict_json(text: str):
    """``json.loads`` that refuses NaN, Infinity and -Infinity (RFC 8259, section 6)."""
    def refuse(token: str):
        raise ValueError(f"not standard JSON: {token}")

    return json.loads(text, parse_constant=refuse)


def test_strict_parser_refuses_what_python_writes_for_infinity() -> None:
    with pytest.raises(ValueError, match="Infinity"):
        strict_json(json.dumps([float("inf")]))


# ----------------------------------------------------------------------------- the bound


@pytest.mark.parametrize("quantity", sorted(UNITS_BY_QUANTITY))
def test_blocks_at_the_ingest_bound_give_finite_float32_spectra(quantity: str) -> None:
    # The worst a block inside the bound can do: every sample at the bound (DC), the
    # sign alternating (all the energy at the Nyquist frequency), a sine in the lowest
    # bins, in each accepted unit, at the lowest and highest rates. Every stored bin must
    # be finite in float32 (IEEE 754 binary32).
    bound = IngestLimits().max_abs_sample
    base_unit = UNITS_BY_QUANTITY[quantity][0]
    n = 4096
    for fs in (2560.0, IngestLimits().max_fs_hz):
        point = Point("p", quantity=quantity, unit=base_unit, fs_hz=fs)
        machine = Machine(id="m-1", machine_class="group2/rigid", points=(point,))
        k = np.arange(n)
        blocks = (np.full(n, bound), bound * (-1.0) ** k, bound * np.sin(2 * np.pi * 3 * k / n))
        for unit in UNITS_BY_QUANTITY[quantity]:
            for samples in blocks:
                w = Waveform("m-1", "p", 1_780_000_000.0, fs, unit, samples, speed_hz=25.0)
                a = analyse_waveform(w, machine, point)
                for spec in (a.spectrum, a.velocity_spectrum):
                    # What the store keeps and the API reads back (SpectrumSnapshot).
                    stored = SpectrumSnapshot(amplitudes=pack_amplitudes(spec.amplitude)).amplitude_array()
                    assert np.isfinite(stored).all() and float(np.abs(stored).max()) < F32_MAX


# ----------------------------------------------------------------------------- service + API


def settings_for(url: str):
    return load_settings(None, env={}, overrides={
        "broker.url": "mqtt://127.0.0.1:1", "database.url": url, "broker.client_id": "svc-json",
    })


def plant_waveforms(n: int, t0: float) -> list[tuple[str, bytes]]:
    """The first ``n`` waveforms of the blower's sample stream, one minute apart from ``t0``."""
    msgs = [m for m in load_streams([PLANT.parent / "ab-1.jsonl"]) if m[0].endswith("/waveform")][:n]
    return [(t, json.dumps(dict(p, ts=iso_utc(t0 + 60 * k))).encode()) for k, (t, p) in enumerate(msgs)]


def at_float32_limit(topic: str, payload: bytes, ts: float) -> tuple[str, bytes]:
    """The same block scaled so its largest sample is 3e38 (finite in float32)."""
    body = json.loads(payload)
    x = np.frombuffer(base64.b64decode(body["samples_f32"]), dtype="<f4").astype(np.float64)
    x = (x / np.abs(x).max() * 3.0e38).astype("<f4")
    assert np.isfinite(x).all()
    body.update(ts=iso_utc(ts), samples_f32=base64.b64encode(x.tobytes()).decode(), id="limit-1")
    return topic, json.dumps(body).encode()


@pytest.fixture(params=BACKENDS)
def plant_url(request: pytest.FixtureRequest, tmp_path: Path):
    with fresh_database(request.param, tmp_path) as url:
        plant_store(url)
        store = Store.open(url)
        try:
            with store.transaction() as s:
                create_user(s, "vic", "viewer-pass-1", "viewer")
        finally:
            store.close()
        yield url


def api(url: str):
    """The dashboard's test client and a viewer's bearer header."""
    store = Store.open(url)
    try:
        with store.transaction() as s:
            token = create_api_token(s, "vic", "test")
    finally:
        store.close()
    app = create_app({"DATABASE_URL": url, "SECRET_KEY": "test", "TESTING": True})
    return app, app.test_client(), {"Authorization": f"Bearer {token}"}


def test_waveform_at_the_float32_limit_is_refused_and_every_answer_is_valid_json(plant_url: str) -> None:
    t0 = float(int(time.time())) - 3600.0
    good = plant_waveforms(6, t0)
    limit = at_float32_limit(*good[0], t0 + 60 * 6)
    svc = Service(settings_for(plant_url), stale_check_s=0)
    try:
        outs = svc.handle_batch([*good, limit])
        counted = svc.metrics.registry.get_sample_value("whirlwatch_rejected_total", {"reason": "samples_absurd"})
    finally:
        svc.stop()
    assert [o.kind for o in outs] == ["waveform"] * 6 + ["rejected"]
    assert outs[-1].reason == "samples_absurd" and counted == 1.0
    store = Store.open(plant_url)
    try:
        with store.session() as s:
            letters = s.scalars(select(DeadLetter.reason)).all()
            ids = s.scalars(select(SpectrumSnapshot.id).order_by(SpectrumSnapshot.id)).all()
    finally:
        store.close()
    assert letters == ["samples_absurd"] and ids
    app, client, auth = api(plant_url)
    try:
        for sid in ids:
            r = client.get(f"/api/v1/spectra/{sid}", headers=auth)
            assert r.status_code == 200
            body = strict_json(r.get_data(as_text=True))
            assert body["non_finite_bins"] == 0 and None not in body["amplitude"]
        for path in ("/api/v1/machines", "/api/v1/machines/ab-1", "/api/v1/machines/ab-1/trends"):
            r = client.get(path, headers=auth)
            assert r.status_code == 200, path
            strict_json(r.get_data(as_text=True))
    finally:
        app.extensions["whirlwatch_engine"].dispose()


def test_spectrum_stored_with_an_infinite_bin_reads_as_null_with_a_count(plant_url: str) -> None:
    # As stored before ingest refused such blocks: a float32 overflow is +inf in the row.
    a = make_analysis("ab-1", "nde-v", 1_780_000_000.0, n_bins=64)
    amp = np.asarray(a.velocity_spectrum.amplitude, dtype=float).copy()
    amp[[3, 9]] = np.inf
    amp[5] = -np.inf
    rows = [r for r in snapshot_rows(a) if r["kind"] == "native"]
    rows[0]["amplitudes"] = pack_amplitudes(amp)
    store = Store.open(plant_url)
    try:
        with store.transaction() as s:
            insert_many_ignore(s.connection(), SpectrumSnapshot.__table__, rows,
                               ("machine_id", "point_id", "ts", "kind"))
            sid = s.scalar(select(func.max(SpectrumSnapshot.id)))
    finally:
        store.close()
    app, client, auth = api(plant_url)
    try:
        r = client.get(f"/api/v1/spectra/{sid}", headers=auth)
        assert r.status_code == 200
        body = strict_json(r.get_data(as_text=True))
    finally:
        app.extensions["whirlwatch_engine"].dispose()
    assert body["non_finite_bins"] == 3
    assert [k for k, v in enumerate(body["amplitude"]) if v is None] == [3, 5, 9]
