"""Retention thins measurements and cadence spectra by the documented policy and never
touches alarm history or evidence spectra (docs/store.md), on what the service stores."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pytest
from service_helpers import message, offline_service
from sqlalchemy import func, select

from monitor.service.items import OutcomeKind
from monitor.sim.faults import SensorFault
from monitor.sim.simulate import MachineModel, simulate_reading
from monitor.store import RetentionPolicy, apply_retention
from monitor.store.models import Alarm, AlarmTransitionRow, Measurement, SpectrumSnapshot

NOW = dt.datetime(2027, 6, 15, 12, 0, tzinfo=dt.UTC)
# pump-2 of tests/fixtures_db.py: one displacement point and no modes (no resonance alarms).
PUMP = MachineModel(machine_id="pump-2", unbalance_kg_m=2e-3, misalignment_n=40.0)


def _ts(days_ago: float, minute: int = 0) -> float:
    t = (NOW - dt.timedelta(days=days_ago)).replace(minute=0, second=0) + dt.timedelta(minutes=minute)
    return t.timestamp()


def _block(ts: float, fault: SensorFault | None = None):
    return simulate_reading(PUMP, "m-ax", speed_hz=24.7, ts=ts, fs_hz=25600.0, n_samples=4096, unit="um",
                            include_speed=True, fault=fault)


def test_thinning_tiers_and_alarm_history_kept(store, plant, database_url):
    policy = RetentionPolicy(raw_days=30, hourly_days=365, spectra_raw_days=30)
    # A clipping amplifier (rails at half the clean block's peak) makes sensor health
    # raise a sensor_fault alarm after three readings and clear it after three clean ones
    # (the detection's default persistence of 3 readings, docs/alarms.md).
    clipped = SensorFault("clipping", level=0.5 * float(np.max(np.abs(_block(_ts(500)).samples))))
    times = (
        # an alarm raised and cleared 500 days ago, its transitions with evidence spectra
        [(_ts(500, 10 * k), clipped if k < 3 else None) for k in range(6)]
        # daily tier: 6 readings over 6 hours of one day, 400 days ago -> 1 kept
        + [(_ts(400, 60 * k) - 6 * 3600, None) for k in range(6)]
        # hourly tier: 4 readings in one hour and 2 in the next, 100 days ago -> 1 + 1 kept
        + [(_ts(100, 10 * k), None) for k in (0, 1, 2, 3, 6, 7)]
        # raw tier: 5 readings in one hour, 2 days ago -> all 5 kept
        + [(_ts(2, 10 * k), None) for k in range(5)]
    )
    clock = {"now": 0.0}
    # A cadence shorter than the reading interval: every reading without an alarm
    # transition keeps its spectra as cadence spectra.
    svc = offline_service(database_url, lambda: clock["now"], spectra_snapshot_interval_s=60)
    events = []
    try:
        for ts, fault in times:  # in time order, each at its own 'now' (ingest refuses old readings)
            clock["now"] = ts
            (out,) = svc.handle_batch([message(_block(ts, fault))])
            assert out.kind == OutcomeKind.WAVEFORM
            events += [(e["transition"], e["kind"]) for e in out.events]
    finally:
        svc.store.close()
    assert events == [("raised", "sensor_fault"), ("cleared", "sensor_fault")]
    with store.transaction() as s:
        result = apply_retention(s, policy, now=NOW)
    with store.session() as s:
        per_tier = {
            name: s.execute(
                select(func.count()).select_from(Measurement).where(Measurement.ts >= lo, Measurement.ts < hi)
            ).scalar_one()
            for name, lo, hi in (
                ("raw", NOW - dt.timedelta(days=30), NOW),
                ("hourly", NOW - dt.timedelta(days=365), NOW - dt.timedelta(days=30)),
                ("daily", NOW - dt.timedelta(days=450), NOW - dt.timedelta(days=365)),
                ("alarm day", NOW - dt.timedelta(days=600), NOW - dt.timedelta(days=450)),
            )
        }
        # the six readings of the alarm fall in one day: thinned to one measurement
        assert per_tier == {"raw": 5, "hourly": 2, "daily": 1, "alarm day": 1}
        assert result.measurements == (4 - 1) + (2 - 1) + (6 - 1) + (6 - 1)
        assert s.execute(select(func.count()).select_from(Alarm)).scalar_one() == 1
        assert s.execute(select(func.count()).select_from(AlarmTransitionRow)).scalar_one() == 2
        evidence = s.execute(
            select(func.count()).select_from(SpectrumSnapshot).where(SpectrumSnapshot.evidence.is_(True))
        ).scalar_one()
        assert evidence == 4  # native + velocity for each of the two transitions, kept forever
        # cadence spectra: the 5 recent pairs kept; older ones one pair per day (the
        # 100-, 400- and 500-days-ago days)
        cadence = s.execute(
            select(func.count()).select_from(SpectrumSnapshot).where(SpectrumSnapshot.evidence.is_(False))
        ).scalar_one()
        assert cadence == 2 * 5 + 2 * 3
    with store.transaction() as s:
        again = apply_retention(s, policy, now=NOW)
    assert (again.measurements, again.spectrum_snapshots) == (0, 0)


def test_policy_validation():
    with pytest.raises(ValueError, match="hourly_days"):
        RetentionPolicy(raw_days=30, hourly_days=10)
    with pytest.raises(ValueError, match="raw_days"):
        RetentionPolicy(raw_days=0)
