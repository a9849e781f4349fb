"""What the service's batch writer stores, on SQLite and PostgreSQL: one row per reading
whatever the redeliveries, spectra on the cadence in the documented encoding, speed
readings, dead letters, and the alarm rows the detectors' transitions make."""

from __future__ import annotations

import datetime as dt
import zlib

import numpy as np
import pytest
from fixtures_db import small_registry
from service_helpers import message, offline_service
from sqlalchemy import func, select
from sqlalchemy.exc import IntegrityError

from monitor.analysis.waveform import analyse_waveform
from monitor.detection.alarms import Transition
from monitor.io.ingest import decode_message
from monitor.model.readings import SpeedReading, Waveform
from monitor.service.items import OutcomeKind
from monitor.sim.simulate import MachineModel, simulate_reading
from monitor.store import acknowledge_alarm, record_transitions
from monitor.store.models import (
    Alarm,
    AlarmTransitionRow,
    DeadLetter,
    DetectorState,
    Measurement,
    SpectrumSnapshot,
    SpeedReadingRow,
)
from monitor.store.writes import insert_many_ignore, measurement_values

T0 = 1_780_000_000.0  # an arbitrary instant (2026-05-28 UTC)
# pump-2 of tests/fixtures_db.py: one displacement point (m-ax) and no modes, so no
# resonance alarm joins the readings here.
PUMP = MachineModel(machine_id="pump-2", unbalance_kg_m=2e-3, misalignment_n=40.0)


def wave(ts: float, **kw) -> tuple[str, bytes]:
    """A waveform message of pump-2's point m-ax (displacement, um)."""
    return message(simulate_reading(PUMP, "m-ax", speed_hz=24.7, ts=ts, fs_hz=25600.0, n_samples=4096,
                                    unit="um", include_speed=True, **kw))


def count(store, model) -> int:
    with store.session() as s:
        return int(s.scalar(select(func.count()).select_from(model)) or 0)


def state_version(store) -> int:
    with store.session() as s:
        return int(s.scalar(select(DetectorState.state["version"].as_integer())
                            .where(DetectorState.machine_id == "pump-2")))


def test_a_reading_delivered_again_is_stored_once(store, plant, database_url):
    m = wave(T0)
    svc = offline_service(database_url, lambda: T0)
    # A second service process on the same database (a shared subscription) gets a copy.
    other = offline_service(database_url, lambda: T0)
    try:
        first = svc.handle_batch([m])
        version = state_version(store)
        again = svc.handle_batch([m]) + other.handle_batch([m])
    finally:
        svc.store.close()
        other.store.close()
    assert [o.kind for o in first + again] == [OutcomeKind.WAVEFORM] + [OutcomeKind.DUPLICATE] * 2
    assert count(store, Measurement) == 1
    assert count(store, SpectrumSnapshot) == 2  # native and velocity, on the cadence, once
    # The copies wrote no detector state either.
    assert state_version(store) == version


def test_spectrum_snapshot_is_zlib_of_little_endian_float32(store, plant, database_url):
    topic, payload = wave(T0)
    svc = offline_service(database_url, lambda: T0)
    try:
        svc.handle_batch([(topic, payload)])
    finally:
        svc.store.close()
    # The spectrum the analysis makes of the message as the service decodes it.
    spec = small_registry().machine("pump-2")
    w = decode_message(topic, payload, small_registry(), prefix="whirlwatch", now=T0)
    analysis = analyse_waveform(w, spec, spec.point("m-ax"))
    with store.session() as s:
        snap = s.scalars(select(SpectrumSnapshot).where(SpectrumSnapshot.kind == "native")).one()
    # reference: numpy's own float32 cast and the zlib format (RFC 1950)
    expected = analysis.spectrum.amplitude.astype("<f4")
    assert zlib.decompress(snap.amplitudes) == expected.tobytes()
    np.testing.assert_array_equal(snap.amplitude_array(), expected)
    np.testing.assert_allclose(snap.freq_hz(), analysis.spectrum.freq_hz, rtol=0, atol=1e-9)
    assert (snap.unit, snap.scaling, snap.n_bins) == (analysis.spectrum.unit, analysis.spectrum.scaling, expected.size)


def test_snapshot_cadence(store, plant, database_url):
    # readings every 60 s with a 300 s cadence keep one spectrum pair per 300 s
    svc = offline_service(database_url, lambda: T0 + 600, spectra_snapshot_interval_s=300)
    try:
        outs = svc.handle_batch([wave(T0 + 60 * i) for i in range(11)])
    finally:
        svc.store.close()
    assert all(o.kind == OutcomeKind.WAVEFORM and not o.events for o in outs)
    with store.session() as s:
        times = s.scalars(select(SpectrumSnapshot.ts).where(SpectrumSnapshot.kind == "native")
                          .order_by(SpectrumSnapshot.ts)).all()
    assert [(t - times[0]).total_seconds() for t in times] == [0, 300, 600]


def test_speed_readings_and_dead_letters(store, plant, database_url):
    speed = message(SpeedReading("pump-2", T0, 24.5))
    svc = offline_service(database_url, lambda: T0)
    try:
        outs = svc.handle_batch([speed, ("whirlwatch/pump-2/m-ax/waveform", b"\xff" * 1000)])
        outs += svc.handle_batch([speed])
    finally:
        svc.store.close()
    assert [o.kind for o in outs] == [OutcomeKind.SPEED, OutcomeKind.REJECTED, OutcomeKind.DUPLICATE]
    assert count(store, SpeedReadingRow) == 1
    with store.session() as s:
        (dl,) = s.scalars(select(DeadLetter)).all()
    assert (dl.reason, dl.topic) == ("not_utf8", "whirlwatch/pump-2/m-ax/waveform")
    assert dl.payload_head == b"\xff" * 256 and dl.payload_size == 1000


def _step(name: str, ts: float, state: str, severity: str = "alert") -> Transition:
    """A transition as the alarm engine makes it (monitor/detection/alarms.py)."""
    alarm = {"id": "fan-7:1", "machine": "fan-7", "point": None, "kind": "resonance_proximity",
             "subject": "frame lateral@1x", "severity": severity, "state": state}
    return Transition(name=name, ts=ts, severity=severity, previous_severity=None, alarm=alarm,
                      evidence={"margin_pct": 8.2, "required_pct": 15.9})


def test_alarm_lifecycle_and_acknowledgement(store, plant):
    with store.transaction() as s:
        record_transitions(s, [_step("raised", T0, "active"), _step("escalated", T0 + 60, "active", "severe")])
    with store.transaction() as s:
        alarm_id = s.scalar(select(Alarm.id))
        acknowledge_alarm(s, alarm_id, "maria", "checked on site", at=dt.datetime.fromtimestamp(T0 + 90, dt.UTC))
    with store.transaction() as s:
        record_transitions(s, [_step("cleared", T0 + 120, "cleared", "severe")])
        # a replay of a recorded transition is a no-op
        record_transitions(s, [_step("cleared", T0 + 120, "cleared", "severe")])
        # after the clear, the same identity raises a new alarm
        record_transitions(s, [_step("raised", T0 + 180, "active")])
    with store.session() as s:
        alarms = s.scalars(select(Alarm).order_by(Alarm.id)).all()
        assert [a.state for a in alarms] == ["cleared", "active"]
        old = alarms[0]
        steps = s.scalars(select(AlarmTransitionRow.transition).where(AlarmTransitionRow.alarm_id == old.id)
                          .order_by(AlarmTransitionRow.at)).all()
        assert steps == ["raised", "escalated", "acknowledged", "cleared"]
        assert old.acknowledged_by == "maria" and old.ack_comment == "checked on site"
        assert old.cleared_at == dt.datetime.fromtimestamp(T0 + 120, dt.UTC)
        assert old.severity == "severe" and old.ref == "fan-7:1"


def test_unknown_point_is_refused_by_foreign_key(store, plant):
    # The service refuses a message of an unknown point at decoding (unknown_point); the
    # foreign key refuses such a row whatever writes it.
    w = Waveform("fan-7", "nowhere", T0, 25600.0, "m/s^2", np.zeros(64))
    with pytest.raises(IntegrityError), store.transaction() as s:
        insert_many_ignore(s.connection(), Measurement.__table__, [measurement_values(w)],
                           ("machine_id", "point_id", "ts"))
