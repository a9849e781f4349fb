"""Retention thins measurements and cadence spectra by the documented policy and never
touches alarm history or evidence spectra (docs/store.md)."""

from __future__ import annotations

import datetime as dt

from fixtures_db import make_analysis
from sqlalchemy import func, select

from monitor.store import AlarmTransitionInput, RetentionPolicy, apply_retention, write_reading
from monitor.store.models import Alarm, AlarmTransitionRow, Measurement, SpectrumSnapshot

NOW = dt.datetime(2027, 6, 15, 12, 0, tzinfo=dt.UTC)


def _ts(days_ago: float, minute: int = 0) -> float:
    t = (NOW - dt.timedelta(days=days_ago)).replace(minute=0, second=0) + dt.timedelta(minutes=minute)
    return t.timestamp()


def test_thinning_tiers_and_alarm_history_kept(store, plant):
    policy = RetentionPolicy(raw_days=30, hourly_days=365, spectra_raw_days=30)
    with store.transaction() as s:
        # raw tier: 5 readings in one hour, 2 days ago -> all 5 kept
        for k in range(5):
            write_reading(s, make_analysis(ts=_ts(2, 10 * k)), snapshot_interval_s=60)
        # hourly tier: 4 readings in one hour and 2 in the next, 100 days ago -> 1 + 1 kept
        for k in range(4):
            write_reading(s, make_analysis(ts=_ts(100, 10 * k)), snapshot_interval_s=60)
        for k in range(2):
            write_reading(s, make_analysis(ts=_ts(100, 60 + 10 * k)))
        # daily tier: 6 readings over 6 hours of one day, 400 days ago -> 1 kept
        for k in range(6):
            write_reading(s, make_analysis(ts=_ts(400, 60 * k) - 6 * 3600))
        # an alarm raised and cleared 500 days ago, with evidence spectra
        old = [
            AlarmTransitionInput("fan-7", "de-h", "amplitude_growth", "overall", "alert", "active", "raised", _ts(500)),
            AlarmTransitionInput("fan-7", "de-h", "amplitude_growth", "overall", "alert", "cleared", "cleared", _ts(500, 30)),
        ]
        write_reading(s, make_analysis(ts=_ts(500)), transitions=old[:1])
        write_reading(s, make_analysis(ts=_ts(500, 30)), transitions=old[1:])
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
        # the two alarm readings fall in one day: thinned to one measurement, evidence stays
        assert per_tier == {"raw": 5, "hourly": 2, "daily": 1, "alarm day": 1}
        assert result.measurements == (4 - 1) + (2 - 1) + (6 - 1) + 1
        assert s.execute(select(func.count()).select_from(Alarm)).scalar_one() == 1
        assert s.execute(select(func.count()).select_from(AlarmTransitionRow)).scalar_one() == 2
        evidence = s.execute(
            select(func.count()).select_from(SpectrumSnapshot).where(SpectrumSnapshot.evidence.is_(True))
        ).scalar_one()
        assert evidence == 4  # native + velocity for each of the two transitions
        # cadence spectra: 5 recent pairs kept; the 100-days-ago hour (4 pairs, one day) -> 1 pair
        cadence = s.execute(
            select(func.count()).select_from(SpectrumSnapshot).where(SpectrumSnapshot.evidence.is_(False))
        ).scalar_one()
        assert cadence == 2 * 5 + 2 * 1
    with store.transaction() as s:
        again = apply_retention(s, policy, now=NOW)
    assert (again.measurements, again.spectrum_snapshots) == (0, 0)


def test_policy_validation():
    import pytest

    with pytest.raises(ValueError, match="hourly_days"):
        RetentionPolicy(raw_days=30, hourly_days=10)
    with pytest.raises(ValueError, match="raw_days"):
        RetentionPolicy(raw_days=0)
