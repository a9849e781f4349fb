"""Shelving and out of service (ISA-18.2 / IEC 62682 terms) through the service's batch
path (no broker; real SQLite and PostgreSQL stores; docs/alarms.md, "Shelving and out of
service").

The machine is invented: a pump of ISO 20816-3 group 2 on a flexible support with one
velocity point. Its readings are a pure 1x sinusoid of a whole number of cycles in the
block, so the overall velocity is the sinusoid's RMS, amplitude / sqrt(2) (Parseval), and
the zone follows from ISO 20816-3, Table A.1: group 2, flexible support, boundaries
A/B 2.3, B/C 4.5, C/D 7.1 mm/s RMS (from memory). Zone C raises an ``alert``, zone D a
``severe`` (docs/alarms.md, "Zones")."""

from __future__ import annotations

import datetime as dt
import math

import numpy as np
import pytest
from fixtures_db import fresh_database
from service_helpers import message, offline_service, stored_evaluator_state
from sqlalchemy import select

from monitor.model.readings import Waveform
from monitor.model.registry import Machine, Point, Registry
from monitor.store import Store, import_registry, upgrade
from monitor.store.audit import Actor
from monitor.store.models import Alarm, AlarmTransitionRow, AuditEvent, Measurement
from monitor.store.out_of_service import put_out_of_service, return_to_service
from monitor.store.shelving import is_suppressed, shelve_alarm

BACKENDS = ["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)]
FS_HZ = 2560.0
N = 4096
#: 40 bins of fs/N = 0.625 Hz: 25 Hz, a whole number of cycles in the block.
ONE_X_HZ = 40 * FS_HZ / N
T0 = dt.datetime(2026, 6, 1, 8, 0, tzinfo=dt.UTC).timestamp()
ENGINEER = Actor("eng", "127.0.0.1")
# ISO 20816-3, Table A.1, group 2 flexible (from memory): a value inside each zone.
ZONE_A_MM_S = 1.5   # below A/B 2.3
ZONE_C_MM_S = 5.8   # between B/C 4.5 and C/D 7.1
ZONE_D_MM_S = 9.0   # above C/D 7.1


def pump() -> Registry:
    return Registry(machines=(Machine(
        id="pump-s", name="Shelving pump", location="test bay", machine_class="group2/flexible",
        speed_range_rpm=(600.0, 3000.0), excitation_orders=(1.0,),
        points=(Point(id="de-v", direction="vertical", quantity="velocity", unit="mm/s", fs_hz=FS_HZ),),
        modes=(),
        # One reading raises (persistence 1); baselines need 20 readings (the default).
        settings={"persistence": 1}),))


def reading(ts: float, rms_mm_s: float) -> Waveform:
    """A 1x sinusoid whose RMS is ``rms_mm_s`` (amplitude sqrt(2) x RMS)."""
    t = np.arange(N) / FS_HZ
    return Waveform("pump-s", "de-v", ts, FS_HZ, "mm/s", math.sqrt(2) * rms_mm_s * np.sin(2 * np.pi * ONE_X_HZ * t),
                    speed_hz=ONE_X_HZ, reading_id=f"pump-s-{ts:.0f}")


@pytest.fixture(params=BACKENDS)
def url(request, tmp_path):
    with fresh_database(request.param, tmp_path) as u:
        upgrade(u)
        store = Store.open(u)
        with store.transaction() as s:
            import_registry(s, pump())
        store.close()
        yield u


class Clock:
    """The service's clock, moved by the test (epoch s)."""

    def __init__(self, t: float) -> None:
        self.t = t

    def __call__(self) -> float:
        return self.t


def when(ts: float) -> dt.datetime:
    return dt.datetime.fromtimestamp(ts, dt.UTC)


def alarms(store: Store) -> list[Alarm]:
    with store.session() as s:
        rows = list(s.scalars(select(Alarm).order_by(Alarm.id)))
        s.expunge_all()
        return rows


def steps(store: Store) -> list[AlarmTransitionRow]:
    with store.session() as s:
        rows = list(s.scalars(select(AlarmTransitionRow).order_by(AlarmTransitionRow.id)))
        s.expunge_all()
        return rows


def growth_state(url: str) -> tuple:
    """The baselines and trends of the stored detector state (what growth has learnt)."""
    state = stored_evaluator_state(url, "pump-s")
    return state["baselines"], state["trends"]


def test_out_of_service_raises_nothing_learns_nothing_then_returns(url):
    clock = Clock(T0)
    svc = offline_service(url, clock=clock)
    store = svc.store
    try:
        for k in range(2):
            svc.handle_batch([message(reading(T0 + 60.0 * k, ZONE_A_MM_S))])
        learnt = growth_state(url)
        with store.transaction() as s:
            put_out_of_service(s, ENGINEER, "pump-s", None, "bearing change", None, when(T0 + 100.0))
        # During the work: zone C readings (would raise an alert) raise nothing, teach nothing.
        for k in range(3):
            ts = T0 + 180.0 + 60.0 * k
            clock.t = ts
            (out,) = svc.handle_batch([message(reading(ts, ZONE_C_MM_S))])
            assert out.events == []
            assert out.status["out_of_service"] is True and out.status["out_of_service_points"] == []
        assert alarms(store) == []
        assert growth_state(url) == learnt
        with store.session() as s:
            rows = list(s.scalars(select(Measurement).order_by(Measurement.ts)))
        assert len(rows) == 5  # still stored
        marked = rows[2:]
        assert all(r.evaluation["out_of_service"] and r.evaluation["growth_ignored"] == "out of service"
                   for r in marked)
        # ISO 20816-3, Table A.1 (group 2, flexible): 5.8 mm/s RMS lies in zone C.
        assert {r.zone for r in marked} == {"C"}
        assert all(r.overall_velocity_mm_s_rms == pytest.approx(ZONE_C_MM_S, rel=0.03) for r in marked)
        # No stale-stream alarm for the silent sensor while the work lasts.
        clock.t = T0 + 86_400.0
        assert svc.check_stale() == []

        with store.transaction() as s:
            (ended,) = return_to_service(s, ENGINEER, "pump-s", None, when(clock.t))
        assert ended.ended_by == "eng"
        ts = clock.t + 60.0
        clock.t = ts
        (out,) = svc.handle_batch([message(reading(ts, ZONE_C_MM_S))])
        assert out.status["out_of_service"] is False
        raised = [e for e in out.events if e["transition"] == "raised"]
        assert [(e["kind"], e["subject"], e["severity"]) for e in raised] == [("amplitude_growth", "overall", "alert")]
        # Learning resumes: the reading went into the baseline.
        assert growth_state(url) != learnt
        with store.session() as s:
            acts = [a for (a,) in s.execute(select(AuditEvent.action).order_by(AuditEvent.id))]
        assert acts == ["out_of_service", "return_to_service"]
    finally:
        store.close()


def test_point_out_of_service_leaves_a_lasting_period_alone(url):
    clock = Clock(T0)
    svc = offline_service(url, clock=clock)
    try:
        with svc.store.transaction() as s:
            put_out_of_service(s, ENGINEER, "pump-s", "de-v", "sensor moved", when(T0 + 600.0), when(T0 - 1.0))
            with pytest.raises(ValueError, match="out of service already"):
                put_out_of_service(s, ENGINEER, "pump-s", "de-v", "another reason", None, when(T0))
        (out,) = svc.handle_batch([message(reading(T0 + 60.0, ZONE_C_MM_S))])
        assert out.events == []
        assert out.status["out_of_service_points"] == ["de-v"] and out.status["out_of_service"] is False
        # The period ends by itself at its 'until': the same reading raises.
        clock.t = T0 + 660.0
        (out,) = svc.handle_batch([message(reading(T0 + 660.0, ZONE_C_MM_S))])
        assert [e["transition"] for e in out.events] == ["raised"]
    finally:
        svc.store.close()


def test_shelved_alarm_keeps_its_transitions_flagged_and_unshelves_at_its_time(url):
    clock = Clock(T0)
    svc = offline_service(url, clock=clock)
    store = svc.store
    try:
        (out,) = svc.handle_batch([message(reading(T0, ZONE_C_MM_S))])
        assert [e["shelved"] for e in out.events] == [False]
        (alarm,) = alarms(store)
        until = when(T0 + 3600.0)
        with store.transaction() as s:
            shelve_alarm(s, ENGINEER, s.get(Alarm, alarm.id), until, "known, repair booked", when(T0 + 10.0))
        # Zone D while shelved: the escalation is recorded, flagged shelved, and its event
        # says so (nothing is notified for it: is_suppressed).
        (out,) = svc.handle_batch([message(reading(T0 + 60.0, ZONE_D_MM_S))])
        (ev,) = out.events
        assert ev["transition"] == "escalated" and ev["severity"] == "severe"
        assert ev["shelved"] and is_suppressed(ev, when(T0 + 60.0))
        names = [(t.transition, t.shelved) for t in steps(store)]
        assert names == [("raised", False), ("shelved", True), ("escalated", True)]
        # Not yet due: nothing unshelved.
        clock.t = T0 + 3599.0
        assert svc.unshelve_expired() == []
        clock.t = T0 + 3601.0
        assert svc.unshelve_expired() == [alarm.id]
        last = steps(store)[-1]
        assert (last.transition, last.at, last.user) == ("unshelved", until, None)
        (a,) = alarms(store)
        assert a.shelved_until is None and not is_suppressed(a, when(clock.t))
        assert a.state == "active" and a.last_transition == "escalated"  # shelving is no detector state
        # After: a transition is not flagged (zone A clears the alarm).
        (out,) = svc.handle_batch([message(reading(T0 + 3660.0, ZONE_A_MM_S))])
        assert [(e["transition"], e["shelved"]) for e in out.events] == [("cleared", False)]
        assert (steps(store)[-1].transition, steps(store)[-1].shelved) == ("cleared", False)
        with store.session() as s:
            acts = [a for (a,) in s.execute(select(AuditEvent.action).order_by(AuditEvent.id))]
        assert acts == ["alarm_shelve"]  # the service's unshelving is a transition, not a person's act
    finally:
        store.close()


def test_a_new_raise_while_shelved_is_shelved_too(url):
    # ISA-18.2 shelves the alarm (its identity), not one occurrence of it.
    clock = Clock(T0)
    svc = offline_service(url, clock=clock)
    store = svc.store
    try:
        svc.handle_batch([message(reading(T0, ZONE_C_MM_S))])
        (first,) = alarms(store)
        with store.transaction() as s:
            shelve_alarm(s, ENGINEER, s.get(Alarm, first.id), when(T0 + 3600.0), "repair booked", when(T0 + 10.0))
        (out,) = svc.handle_batch([message(reading(T0 + 60.0, ZONE_A_MM_S))])
        assert [(e["transition"], e["shelved"]) for e in out.events] == [("cleared", True)]
        (out,) = svc.handle_batch([message(reading(T0 + 120.0, ZONE_C_MM_S))])
        (ev,) = out.events
        assert ev["transition"] == "raised" and ev["id"] != first.id
        assert ev["shelved"] and ev["shelved_by"] == "eng" and ev["shelve_comment"] == "repair booked"
        # Both rows end their shelving at its time.
        clock.t = T0 + 3600.0
        assert sorted(svc.unshelve_expired()) == [first.id, ev["id"]]
        assert not any(is_suppressed(a, when(clock.t)) for a in alarms(store))
    finally:
        store.close()


def test_open_alarms_stay_as_they_are_while_out_of_service(url):
    clock = Clock(T0)
    svc = offline_service(url, clock=clock)
    store = svc.store
    try:
        svc.handle_batch([message(reading(T0, ZONE_C_MM_S))])
        with store.transaction() as s:
            put_out_of_service(s, ENGINEER, "pump-s", None, "bearing change", None, when(T0 + 10.0))
        # Zone D (ISO 20816-3, Table A.1, group 2 flexible: above C/D 7.1 mm/s) would
        # escalate to severe, zone A would clear: out of service neither happens.
        for k, level in enumerate((ZONE_D_MM_S, ZONE_A_MM_S)):
            clock.t = T0 + 60.0 * (k + 1)
            (out,) = svc.handle_batch([message(reading(clock.t, level))])
            assert out.events == []
        (a,) = alarms(store)
        assert (a.state, a.severity, a.last_transition) == ("active", "alert", "raised")
    finally:
        store.close()
