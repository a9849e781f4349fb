"""Raw time waveforms kept through the service's batch path: with every alarm transition of
a waveform (as evidence) and on the ``spectra.waveform_interval_s`` cadence, as zlib of
little-endian float32, and thinned by retention as the cadence spectra are (docs/store.md)."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pytest
from service_helpers import message, offline_service
from sqlalchemy import select

from monitor.service.items import OutcomeKind
from monitor.sim.faults import SensorFault
from monitor.sim.simulate import MachineModel, simulate_reading
from monitor.store import RetentionPolicy, apply_retention
from monitor.store.models import WaveformSnapshot, pack_amplitudes

NOW = dt.datetime(2027, 6, 15, 12, 0, tzinfo=dt.UTC)
# pump-2 of tests/fixtures_db.py: one displacement point and no modes (no resonance alarms).
PUMP = MachineModel(machine_id="pump-2", unbalance_kg_m=2e-3, misalignment_n=40.0)


def _block(ts: float, fault: SensorFault | None = None):
    return simulate_reading(PUMP, "m-ax", speed_hz=24.7, ts=ts, fs_hz=25600.0, n_samples=4096, unit="um",
                            include_speed=True, fault=fault)


def _feed(url: str, blocks, **settings) -> list[tuple[str, str]]:
    """``blocks`` through an offline service, each at its own clock; the alarm events."""
    clock = {"now": 0.0}
    svc = offline_service(url, lambda: clock["now"], **settings)
    events = []
    try:
        for b in blocks:
            clock["now"] = b.ts
            (out,) = svc.handle_batch([message(b)])
            assert out.kind == OutcomeKind.WAVEFORM
            events += [(e["transition"], e["kind"]) for e in out.events]
    finally:
        svc.store.close()
    return events


def _waveforms(store) -> list[WaveformSnapshot]:
    with store.session() as s:
        rows = list(s.scalars(select(WaveformSnapshot).order_by(WaveformSnapshot.ts)))
        s.expunge_all()
    return rows


def test_samples_round_trip_exact_to_float32():
    # IEEE 754 binary32 (float32) keeps 24 significant bits: the stored samples must equal
    # the sender's samples rounded to float32 bit for bit (numpy's cast rounds to nearest).
    x = np.random.default_rng(5).normal(0.0, 3.0, 8192) * np.array([1.0, 1e-30, 1e30, 1.0])[np.arange(8192) % 4]
    row = WaveformSnapshot(samples=pack_amplitudes(x))
    back = row.sample_array()
    assert back.dtype == np.float32
    assert np.array_equal(back.view(np.uint32), x.astype(np.float32).view(np.uint32))


def test_kept_with_transitions_and_on_the_cadence(store, plant, database_url):
    t0 = (NOW - dt.timedelta(days=1)).timestamp()
    # Clipping at half the clean block's peak raises a sensor_fault after three readings and
    # clears it after three clean ones (the default persistence of 3, docs/alarms.md).
    clipped = SensorFault("clipping", level=0.5 * float(np.max(np.abs(_block(t0).samples))))
    blocks = [_block(t0 + 600.0 * k, clipped if 4 <= k < 7 else None) for k in range(14)]
    events = _feed(database_url, blocks, spectra_waveform_interval_s=1800)
    assert events == [("raised", "sensor_fault"), ("cleared", "sensor_fault")]
    rows = _waveforms(store)
    kept = {round(r.ts.timestamp()): r for r in rows}
    evidence = sorted(k for k, r in kept.items() if r.evidence)
    # the raise rides on the third clipped block (k = 6), the clear on the third clean one (k = 9)
    assert evidence == [round(t0 + 600.0 * 6), round(t0 + 600.0 * 9)]
    cadence = sorted(k for k, r in kept.items() if not r.evidence)
    # one every 1800 s, counting the evidence waveforms: k = 0, 3, then 6 (evidence), 9
    # (evidence), 12
    assert cadence == [round(t0 + 600.0 * k) for k in (0, 3, 12)]
    for r in rows:
        b = next(b for b in blocks if round(b.ts) == round(r.ts.timestamp()))
        assert (r.machine_id, r.point_id, r.unit, r.fs_hz, r.n_samples) == ("pump-2", "m-ax", b.unit, b.fs_hz, 4096)
        assert r.speed_hz == pytest.approx(24.7)
        assert np.array_equal(r.sample_array(), np.asarray(b.samples, dtype=np.float32))


def test_interval_zero_keeps_only_evidence(store, plant, database_url):
    t0 = (NOW - dt.timedelta(days=1)).timestamp()
    clipped = SensorFault("clipping", level=0.5 * float(np.max(np.abs(_block(t0).samples))))
    blocks = [_block(t0 + 600.0 * k, clipped if k < 3 else None) for k in range(6)]
    _feed(database_url, blocks, spectra_waveform_interval_s=0)
    assert [r.evidence for r in _waveforms(store)] == [True, True]


def test_retention_thins_cadence_waveforms_and_keeps_evidence(store, plant, database_url):
    policy = RetentionPolicy(raw_days=30, hourly_days=365, spectra_raw_days=30)

    def ts(days_ago: float, minute: int) -> float:
        day = (NOW - dt.timedelta(days=days_ago)).replace(hour=6, minute=0, second=0)
        return (day + dt.timedelta(minutes=minute)).timestamp()

    clipped = SensorFault("clipping", level=0.5 * float(np.max(np.abs(_block(ts(500, 0)).samples))))
    blocks = ([_block(ts(500, 10 * k), clipped if k < 3 else None) for k in range(6)]  # alarm, 500 days ago
              + [_block(ts(100, 10 * k)) for k in range(4)]  # one old day
              + [_block(ts(2, 10 * k)) for k in range(3)])  # recent
    # a cadence shorter than the reading interval: every block without a transition is kept
    _feed(database_url, blocks, spectra_waveform_interval_s=60)
    assert len(_waveforms(store)) == 13
    with store.transaction() as s:
        result = apply_retention(s, policy, now=NOW)
    rows = _waveforms(store)
    # 500 days ago: 2 evidence kept whatever their age, and of the 4 cadence ones the
    # first of the day; 100 days ago: the first of the day; the recent 3 all kept
    assert sum(r.evidence for r in rows) == 2
    assert [r.ts.timestamp() for r in rows if not r.evidence] == [ts(500, 0), ts(100, 0), *(ts(2, 10 * k) for k in range(3))]
    assert result.waveform_snapshots == 3 + 3
    with store.transaction() as s:
        assert apply_retention(s, policy, now=NOW).waveform_snapshots == 0


def test_a_flat_block_with_transitions_keeps_its_waveform(store, plant, database_url):
    # A dead sensor's flat block: sensor health raises flat_line after three of them
    # (docs/alarms.md); the raw samples are the evidence, whether or not the analysis
    # could use them.
    t0 = (NOW - dt.timedelta(days=1)).timestamp()
    flat = SensorFault("flat_line")
    blocks = [_block(t0 + 600.0 * k, flat) for k in range(3)]
    events = _feed(database_url, blocks, spectra_waveform_interval_s=0)
    assert ("raised", "sensor_fault") in events
    rows = _waveforms(store)
    assert [r.evidence for r in rows] == [True]
    assert np.ptp(rows[0].sample_array()) == 0.0
