"""Idempotent writes of readings and alarm transitions; shared queries."""

from __future__ import annotations

import datetime as dt
import zlib

import numpy as np
import pytest
from fixtures_db import make_analysis
from sqlalchemy import event, func, select

from monitor.detection.alarms import Transition
from monitor.model.readings import SpeedReading
from monitor.store import (
    AlarmTransitionInput,
    acknowledge_alarm,
    add_dead_letter,
    save_detector_state,
    write_reading,
    write_speed_reading,
)
from monitor.store import queries as q
from monitor.store.models import (
    Alarm,
    AlarmTransitionRow,
    Measurement,
    SpectrumSnapshot,
    SpeedReadingRow,
)

T0 = 1_780_000_000.0  # an arbitrary instant (2026-05-28 UTC)


def _count(session, model) -> int:
    return session.execute(select(func.count()).select_from(model)).scalar_one()


def _engine_transition(name: str, ts: float, state: str, severity: str = "alert", **kw):
    alarm = {
        "id": "fan-7:1", "machine": "fan-7", "point": "de-h", "kind": "amplitude_growth",
        "subject": "overall", "severity": severity, "state": state,
    }
    return Transition(name=name, ts=ts, severity=severity, previous_severity=None, alarm=alarm,
                      evidence={"overall_mm_s": 4.9, "limit_mm_s": 4.5}, **kw)


def test_same_reading_twice_gives_one_row_and_transitions_once(store, plant):
    analysis = make_analysis(ts=T0)
    raised = _engine_transition("raised", T0, "active")
    for attempt in range(2):
        with store.transaction() as s:
            result = write_reading(
                s, analysis, zone="C", transitions=[raised],
                evaluation={"margins": [{"mode": "frame lateral", "margin_pct": 8.2}]},
                detector_state={"count": attempt},
            )
        assert result.inserted is (attempt == 0)
    with store.session() as s:
        assert _count(s, Measurement) == 1
        assert _count(s, AlarmTransitionRow) == 1
        assert _count(s, Alarm) == 1
        # native + velocity spectrum, kept once as evidence
        assert _count(s, SpectrumSnapshot) == 2
        # the replay did not overwrite the detector state
        assert q.load_detector_states(s) == {"fan-7": {"count": 0}}
        m = s.execute(select(Measurement)).scalar_one()
        assert m.ts == dt.datetime.fromtimestamp(T0, dt.UTC)
        # round trip: the zone and 2x phase of the record written (tests/fixtures_db.py)
        assert m.zone == "C" and m.orders[1]["phase_deg"] == 12.0
        alarm = s.execute(select(Alarm)).scalar_one()
        assert alarm.state == "active" and alarm.ref == "fan-7:1"
        tr = s.execute(select(AlarmTransitionRow)).scalar_one()
        snap = s.get(SpectrumSnapshot, tr.spectrum_snapshot_id)
        assert snap.evidence and snap.kind == "velocity"


def test_replay_from_a_second_engine_is_a_no_op(store, plant, database_url):
    # A redelivery may reach another service process: a separate engine, same database.
    from monitor.store import Store

    other = Store.open(database_url)
    try:
        for st in (store, other):
            with st.transaction() as s:
                write_reading(s, make_analysis(ts=T0), transitions=[_engine_transition("raised", T0, "active")])
    finally:
        other.close()
    with store.session() as s:
        assert _count(s, Measurement) == 1 and _count(s, AlarmTransitionRow) == 1


def test_spectrum_snapshot_is_zlib_of_little_endian_float32(store, plant):
    analysis = make_analysis(ts=T0, n_bins=513)
    with store.transaction() as s:
        write_reading(s, analysis, keep_spectrum=True)
    with store.session() as s:
        snap = q.latest_spectrum(s, "fan-7", "de-h", kind="native")
        # reference: numpy's own float32 cast and the zlib format (RFC 1950)
        expected = analysis.spectrum.amplitude.astype("<f4")
        assert zlib.decompress(snap.amplitudes) == expected.tobytes()
        np.testing.assert_array_equal(snap.amplitude_array(), expected)
        np.testing.assert_allclose(snap.freq_hz(), analysis.spectrum.freq_hz, rtol=0, atol=1e-9)
        assert (snap.unit, snap.scaling, snap.n_bins) == ("m/s^2", "peak", 513)


def test_snapshot_cadence(store, plant):
    # readings every 60 s with a 300 s cadence keep one spectrum pair per 300 s
    with store.transaction() as s:
        for i in range(11):
            write_reading(s, make_analysis(ts=T0 + 60 * i), snapshot_interval_s=300)
    with store.session() as s:
        times = s.execute(
            select(SpectrumSnapshot.ts).where(SpectrumSnapshot.kind == "native").order_by(SpectrumSnapshot.ts)
        ).scalars().all()
    assert [(t - times[0]).total_seconds() for t in times] == [0, 300, 600]


def test_alarm_lifecycle_and_acknowledgement(store, plant):
    steps = [
        AlarmTransitionInput("fan-7", None, "resonance_proximity", "frame lateral", "alert", "active", "raised", T0),
        AlarmTransitionInput("fan-7", None, "resonance_proximity", "frame lateral", "severe", "active", "escalated", T0 + 60),
    ]
    with store.transaction() as s:
        write_reading(s, make_analysis(ts=T0), transitions=steps[:1])
        write_reading(s, make_analysis(ts=T0 + 60), transitions=steps[1:])
    with store.transaction() as s:
        (alarm,) = q.active_alarms(s)["fan-7"]
        acknowledge_alarm(s, alarm.id, "maria", "checked on site")
    with store.transaction() as s:
        cleared = AlarmTransitionInput("fan-7", None, "resonance_proximity", "frame lateral", "severe", "cleared", "cleared", T0 + 120)
        write_reading(s, make_analysis(ts=T0 + 120), transitions=[cleared])
        # after the clear, the same identity raises a new alarm
        again = AlarmTransitionInput("fan-7", None, "resonance_proximity", "frame lateral", "alert", "active", "raised", T0 + 180)
        write_reading(s, make_analysis(ts=T0 + 180), transitions=[again])
    with store.session() as s:
        alarms = q.list_alarms(s, machine="fan-7").items
        assert [a.state for a in alarms] == ["active", "cleared"]
        old = q.get_alarm(s, alarms[1].id)
        assert [t.transition for t in old.transitions] == ["raised", "escalated", "acknowledged", "cleared"]
        assert old.acknowledged_by == "maria" and old.ack_comment == "checked on site"
        assert old.cleared_at == dt.datetime.fromtimestamp(T0 + 120, dt.UTC)
        assert q.alarm_as_json(old)["severity"] == "severe"


def test_alarm_pagination_and_filters(store, plant):
    with store.transaction() as s:
        for i in range(7):
            t = AlarmTransitionInput("pump-2", "m-ax", "sensor_fault", f"s{i}", "advisory", "active", "raised", T0 + i)
            write_reading(s, make_analysis("pump-2", "m-ax", ts=T0 + i), transitions=[t])
    seen, cursor = [], None
    with store.session() as s:
        while True:
            page = q.list_alarms(s, machine="pump-2", limit=3, cursor=cursor)
            seen += [a.subject for a in page.items]
            if page.next is None:
                break
            cursor = page.next
        assert seen == [f"s{i}" for i in reversed(range(7))]
        assert q.list_alarms(s, kind="resonance_proximity").items == []
        since = dt.datetime.fromtimestamp(T0 + 5, dt.UTC)
        assert [a.subject for a in q.list_alarms(s, since=since).items] == ["s6", "s5"]
        assert q.active_alarm_counts(s) == {"pump-2": {"advisory": 7}}


def test_latest_per_point_is_one_statement_whatever_the_plant_size(store, plant):
    with store.transaction() as s:
        for i in range(3):
            for m, p in (("fan-7", "de-h"), ("fan-7", "nde-v"), ("pump-2", "m-ax")):
                write_reading(s, make_analysis(m, p, ts=T0 + i, overall=float(i)))
    statements: list[str] = []

    def count(*args):
        statements.append(args[2])

    event.listen(store.engine, "before_cursor_execute", count)
    try:
        with store.session() as s:
            latest = q.latest_measurements(s)
            active = q.active_alarms(s)
    finally:
        event.remove(store.engine, "before_cursor_execute", count)
    # SQLite issues BEGIN through the engine as well; count SELECTs only.
    assert sum(st.lstrip().upper().startswith("SELECT") for st in statements) == 2
    assert active == {}
    assert {k: v.overall_velocity_mm_s_rms for k, v in latest.items()} == {
        ("fan-7", "de-h"): 2.0, ("fan-7", "nde-v"): 2.0, ("pump-2", "m-ax"): 2.0,
    }


@pytest.mark.parametrize("n, buckets", [(100, 7), (10, 50)])
def test_trend_decimation_matches_numpy_array_split(store, plant, n, buckets):
    rng = np.random.default_rng(3)
    values = rng.random(n) * 5
    with store.transaction() as s:
        for i, v in enumerate(values):
            write_reading(s, make_analysis(ts=T0 + 10 * i, overall=float(v)))
    start = dt.datetime.fromtimestamp(T0, dt.UTC)
    with store.session() as s:
        tr = q.trend(s, "fan-7", "de-h", start, start + dt.timedelta(days=1), max_points=buckets)
    # SQL NTILE puts the remainder rows into the first buckets, as numpy.array_split does.
    parts = np.array_split(values, min(buckets, n))
    assert [p.count for p in tr] == [len(x) for x in parts]
    np.testing.assert_allclose([p.mean for p in tr], [x.mean() for x in parts], rtol=1e-12)
    np.testing.assert_allclose([p.max for p in tr], [x.max() for x in parts], rtol=0)
    np.testing.assert_allclose([p.min for p in tr], [x.min() for x in parts], rtol=0)


def test_speed_readings_and_dead_letters(store, plant):
    with store.transaction() as s:
        assert write_speed_reading(s, SpeedReading("fan-7", T0, 24.5)) is True
        assert write_speed_reading(s, SpeedReading("fan-7", T0, 24.5)) is False
        add_dead_letter(s, topic="whirlwatch/fan-7/de-h/waveform", reason="not_json", detail="x", payload=b"\xff" * 1000)
        save_detector_state(s, "pump-2", {"baseline": [1.0, float("nan")]}, T0)
    with store.session() as s:
        assert _count(s, SpeedReadingRow) == 1
        (dl,) = q.recent_dead_letters(s)
        assert len(dl.payload_head) == 256 and dl.payload_size == 1000
        assert q.dead_letter_counts(s) == {"not_json": 1}
        assert q.load_detector_states(s)["pump-2"] == {"baseline": [1.0, None]}


def test_unknown_point_is_refused_by_foreign_key(store, plant):
    from sqlalchemy.exc import IntegrityError

    with pytest.raises(IntegrityError), store.transaction() as s:
        write_reading(s, make_analysis("fan-7", "nowhere", ts=T0))
