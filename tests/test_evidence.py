"""Evidence spectra on every alarm transition, through the service's batch path (no
broker, real SQLite and PostgreSQL stores; docs/alarms.md, "Evidence spectra").

The machine is invented: a fan with one accelerometer and a stored 20 Hz mode (damping
ratio 0.05). Its waveforms are a 1x sinusoid plus a little noise, so what the stored
spectrum must show is known in closed form."""

from __future__ import annotations

import datetime as dt
import json
import math

import numpy as np
import pytest
from fixtures_db import fresh_database
from service_helpers import message, offline_service, plant_store, traffic
from sqlalchemy import select

from monitor.model.readings import SpeedReading, Waveform
from monitor.model.registry import Machine, Mode, Point, Registry
from monitor.service.items import OutcomeKind
from monitor.store import Store, import_registry, upgrade
from monitor.store.models import Alarm, AlarmTransitionRow, Measurement, SpectrumSnapshot

BACKENDS = ["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)]
FS_HZ = 2560.0
N = 4096
#: 31 bins of fs/N = 0.625 Hz: a whole number of cycles in the block, so the Hann window's
#: peak reads the amplitude without scalloping loss (Harris 1978).
ONE_X_HZ = 31 * FS_HZ / N
AMPLITUDE_M_S2 = 2.0
T0 = dt.datetime(2026, 5, 4, 8, 0, tzinfo=dt.UTC).timestamp()


def parse_time(text: str) -> dt.datetime:
    return dt.datetime.fromisoformat(text.replace("Z", "+00:00"))


def fan() -> Registry:
    return Registry(machines=(Machine(
        id="fan-e", name="Evidence fan", location="test bay", machine_class="group2/flexible",
        speed_range_rpm=(360.0, 2400.0), excitation_orders=(1.0, 2.0),
        points=(Point(id="de-h", direction="horizontal", quantity="acceleration", unit="m/s^2", fs_hz=FS_HZ),),
        modes=(Mode(name="pedestal", frequency_hz=20.0, damping_ratio=0.05),),
        # No dwell: these tests are about the spectra a transition keeps, so the alarms
        # move at the persistence count alone (docs/alarms.md, "Dwell").
        settings={"resonance_dwell_s": 0}),))


def waveform(ts: float, seed: int) -> Waveform:
    t = np.arange(N) / FS_HZ
    noise = np.random.default_rng(seed).normal(0.0, 0.01, N)
    return Waveform("fan-e", "de-h", ts, FS_HZ, "m/s^2", AMPLITUDE_M_S2 * np.sin(2 * np.pi * ONE_X_HZ * t) + noise,
                    speed_hz=ONE_X_HZ, reading_id=f"fan-e-{seed}")


def speed(ts: float, hz: float) -> SpeedReading:
    return SpeedReading("fan-e", ts, hz)


@pytest.fixture(params=BACKENDS)
def url(request, tmp_path):
    with fresh_database(request.param, tmp_path) as u:
        upgrade(u)
        store = Store.open(u)
        with store.transaction() as s:
            import_registry(s, fan())
        store.close()
        yield u


def transitions(url: str) -> list[tuple[AlarmTransitionRow, Alarm]]:
    store = Store.open(url)
    try:
        with store.session() as s:
            rows = s.execute(select(AlarmTransitionRow, Alarm).join(Alarm).order_by(AlarmTransitionRow.id)).all()
            s.expunge_all()
            return [(t, a) for t, a in rows]
    finally:
        store.close()


def spectra(url: str) -> dict[int, SpectrumSnapshot]:
    store = Store.open(url)
    try:
        with store.session() as s:
            rows = s.scalars(select(SpectrumSnapshot)).all()
            s.expunge_all()
            return {r.id: r for r in rows}
    finally:
        store.close()


def test_resonance_transitions_carry_evidence_spectra(url):
    svc = offline_service(url, clock=lambda: T0 + 3600.0)
    try:
        # 1x 3.1 % below a 20 Hz mode: inside any required margin; raised after the
        # persistence (3 readings) by the waveforms' own speed.
        waves = [waveform(T0 + 60.0 * k, k) for k in range(4)]
        for w in waves:
            assert svc.handle_batch([message(w)])[0].kind == OutcomeKind.WAVEFORM
        # The drive moves 1x to 30 Hz (50 % above the mode, 2x at 200 %), reported by the speed topic
        # only: the alarm clears after the persistence, on a speed message.
        last_wave = waves[-1].ts
        cleared_at = [last_wave + 10.0 * k for k in (1, 2, 3)]
        for ts in cleared_at:
            svc.handle_batch([message(speed(ts, 30.0))])
        # Back at the mode, a speed message with the waveform of the same instant behind it
        # in one batch (the tach reports first): raised again on a speed message.
        again = [last_wave + 600.0 + 60.0 * k for k in range(3)]
        for k, ts in enumerate(again):
            svc.handle_batch([message(speed(ts, ONE_X_HZ)), message(waveform(ts, 10 + k))])
    finally:
        svc.store.close()

    rows = transitions(url)
    resonance = [(t, a) for t, a in rows if a.kind == "resonance_proximity"]
    names = [t.transition for t, _ in resonance]
    assert names[0] == "raised" and "cleared" in names and names.count("raised") == 2, names
    stored = spectra(url)
    for t, _ in resonance:
        ev = t.evidence
        assert t.spectrum_snapshot_id is not None and ev["spectrum_snapshot_id"] == t.spectrum_snapshot_id
        (entry,) = ev["spectra"]
        assert entry["point"] == "de-h" and entry["kind"] == "velocity" and entry["spectrum_id"] == t.spectrum_snapshot_id
        sn = stored[entry["spectrum_id"]]
        assert sn.evidence and sn.kind == "velocity"
        # The age is the time from the spectrum's reading to the transition.
        assert entry["age_s"] == pytest.approx(t.at.timestamp() - sn.ts.timestamp(), abs=1e-6)
        assert entry["ts"] == sn.ts.isoformat().replace("+00:00", "Z")
        # The spectrum of the reading: velocity of a sinusoidal acceleration a sin(wt) is
        # a/w peak (integration of a sinusoid), 1000 a / (2 pi f) mm/s, at 1x.
        amp, freq = sn.amplitude_array(), sn.freq_hz()
        k = int(np.argmax(amp))
        assert freq[k] == pytest.approx(ONE_X_HZ)
        assert amp[k] == pytest.approx(1000.0 * AMPLITUDE_M_S2 / (2 * math.pi * ONE_X_HZ), rel=0.02)

    by_name = {(t.transition, round(t.at.timestamp(), 3)): t for t, _ in resonance}
    # Raised by a waveform: its own spectrum, age 0.
    first = resonance[0][0]
    assert first.at.timestamp() == pytest.approx(T0 + 120.0) and first.evidence["spectra"][0]["age_s"] == 0.0
    # Cleared by a speed message: the machine's latest spectrum (the last waveform's), as old
    # as the time between them.
    clear = by_name[("cleared", round(cleared_at[-1], 3))]
    assert clear.evidence["spectra"][0]["age_s"] == pytest.approx(cleared_at[-1] - last_wave, abs=1e-6)
    # Raised again by a speed message whose waveform of the same instant came behind it in
    # the batch: that waveform's spectrum, age 0.
    second = [t for t, _ in resonance if t.transition == "raised"][1]
    assert second.at.timestamp() == pytest.approx(again[-1])
    assert second.evidence["spectra"][0]["age_s"] == 0.0
    assert stored[second.spectrum_snapshot_id].ts.timestamp() == pytest.approx(again[-1])

    # Sizes stay bounded: at most the two spectra (native, velocity) of each waveform are
    # stored, whoever refers to them; each has N/2 + 1 bins of fs/N Hz (the one-sided DFT,
    # numpy.fft.rfftfreq); a transition's evidence stays small.
    waveforms = 4 + len(again)
    assert len(stored) <= 2 * waveforms
    assert {s.n_bins for s in stored.values()} == {np.fft.rfftfreq(N).size}
    assert all(s.df_hz == pytest.approx(FS_HZ / N) for s in stored.values())
    assert max(len(json.dumps(t.evidence)) for t, _ in rows) < 8000


def test_bearing_transition_keeps_the_envelope_spectrum(tmp_path):
    """The sample pump with an outer-race defect (sample_streams/README.md), through the
    service: the bearing line's growth alarm keeps the reading's envelope spectrum beside
    its velocity spectrum, and that envelope spectrum shows the defect at BPFO."""
    url = f"sqlite:///{tmp_path / 'sp2.sqlite'}"
    plant_store(url)
    msgs = traffic("sp-2")
    now = {"t": 0.0}
    svc = offline_service(url, clock=lambda: now["t"])
    try:
        for i in range(0, len(msgs), 8):
            batch = msgs[i:i + 8]
            now["t"] = max(parse_time(json.loads(p)["ts"]).timestamp() for _, p in batch) + 5.0
            assert all(o.kind == OutcomeKind.WAVEFORM for o in svc.handle_batch(batch))
    finally:
        svc.store.close()
    bearing = [(t, a) for t, a in transitions(url) if a.subject.startswith("bearing_")]
    assert bearing, "the defect raised no bearing alarm"
    stored = spectra(url)
    store = Store.open(url)
    try:
        with store.session() as s:
            speeds = dict(s.execute(select(Measurement.ts, Measurement.speed_hz)).all())
    finally:
        store.close()
    for t, _ in bearing:
        kinds = {e["kind"]: e for e in t.evidence["spectra"]}
        assert set(kinds) == {"velocity", "envelope"}
        env = stored[kinds["envelope"]["spectrum_id"]]
        assert env.kind == "envelope" and env.evidence and env.ts == stored[kinds["velocity"]["spectrum_id"]].ts
        # BPFO = n/2 fr (1 - d/D cos(phi)) (Randall and Antoni 2011, section 2, from memory); 9 balls of
        # 7.94 mm on a 39.04 mm pitch circle, contact angle 0 (sample_streams/plant.toml).
        fr = speeds[env.ts]
        bpfo = 9 / 2 * fr * (1 - 7.94 / 39.04)
        amp, freq = env.amplitude_array(), env.freq_hz()
        band = (freq > 0.5 * bpfo) & (freq < 1.5 * bpfo)
        # Within the 1-2 % slip of a rolling element (Randall and Antoni 2011, section 2).
        assert freq[band][np.argmax(amp[band])] == pytest.approx(bpfo, rel=0.02)
