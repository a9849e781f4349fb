"""Alarms of what leaves the registry close: a mode deleted or renamed, a point or a machine
retired. Each open alarm keyed to it is closed with a ``cleared`` transition whose evidence
says why, recorded and published like any other, whether the change arrives while the
service runs or while it is stopped; a retired machine's retained status is removed.

Real SQLite files and PostgreSQL (tests/fixtures_db.py), the JSON API through Flask's test
client, ``machines import --replace`` through the command line, the service's batch path
(``handle_batch``) and, for MQTT, a private Mosquitto.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from click.testing import CliRunner
from registry_api import Api, run_bounded, settings_for
from service_helpers import PLANT, traffic
from sqlalchemy import select

from monitor.cli import main as cli
from monitor.config import load_settings
from monitor.detection.alarms import TRANSITIONS
from monitor.io.streams import parse_ts
from monitor.service.service import Service
from monitor.store import Store
from monitor.store.models import Alarm, AlarmTransitionRow

MODE_REMOVED = "mode removed from the registry"
POINT_RETIRED = "point retired from the registry"
MACHINE_RETIRED = "machine retired from the registry"

#: A mode added to the raw water pump just above its running speed (about 24.75 Hz,
#: sample_streams/README.md). API 684 (docs/alarms.md): damping ratio 0.05 gives
#: AF = 1 / (2 zeta) = 10 (Thomson, half-power bandwidth), so a mode above the excitation
#: needs 10 + 17 (1 - 1 / (AF - 1.5)) = 25.0 % of separation; 1x lies about 1 % below
#: it, far inside: a resonance alarm after `persistence` readings.
NEAR_MODE = {"name": "motor frame", "frequency_hz": 25.0, "damping_ratio": 0.05, "source": "impact test"}


def waveforms(name: str) -> list[tuple[str, bytes]]:
    """Every waveform message of one sample stream, retimed to end now."""
    return [m for m in traffic(name) if m[0].endswith("/waveform")]


def on_point(messages: list[tuple[str, bytes]], point: str) -> list[tuple[str, bytes]]:
    """The same messages sent as readings of another point of their machine."""
    out = []
    for topic, payload in messages:
        parts = topic.split("/")
        parts[2] = point
        out.append(("/".join(parts), payload))
    return out


def open_alarms(url: str, machine: str) -> list[tuple[str | None, str, str]]:
    """(point, kind, subject) of the machine's alarms not cleared, as stored."""
    store = Store.open(url)
    try:
        with store.session() as s:
            rows = s.scalars(select(Alarm).where(Alarm.machine_id == machine, Alarm.state != "cleared")).all()
            return sorted(((a.point_id, a.kind, a.subject) for a in rows), key=lambda a: (a[0] or "", a[1], a[2]))
    finally:
        store.close()


def closing_rows(url: str, machine: str) -> list[tuple[str | None, str, str, str, dict]]:
    """(point, kind, subject, transition, evidence) of the machine's stored ``cleared``
    transitions."""
    store = Store.open(url)
    try:
        with store.session() as s:
            rows = s.execute(
                select(Alarm.point_id, Alarm.kind, Alarm.subject, AlarmTransitionRow.transition,
                       AlarmTransitionRow.evidence)
                .join(AlarmTransitionRow, AlarmTransitionRow.alarm_id == Alarm.id)
                .where(Alarm.machine_id == machine, AlarmTransitionRow.transition == "cleared")
                .order_by(AlarmTransitionRow.id)).all()
            return [tuple(r) for r in rows]
    finally:
        store.close()


def events_of(outcomes) -> list[dict]:
    return [e for o in outcomes for e in o.events]


def import_file(url: str, path: Path, *, replace: bool) -> str:
    args = ["machines", "import", str(path), "--database", url] + (["--replace"] if replace else [])
    res = CliRunner().invoke(cli, args)
    assert res.exit_code == 0, res.output
    return res.output


def plant_without(tmp_path: Path, machine: str) -> Path:
    """The sample plant's registry file without one machine's table."""
    text = PLANT.read_text()
    start = text.index(f'[[machines]]\nid = "{machine}"')
    nxt = text.find("[[machines]]", start + 1)
    out = tmp_path / f"plant-without-{machine}.toml"
    out.write_text(text[:start] + (text[nxt:] if nxt >= 0 else ""))
    return out


def plant_with_second_point(tmp_path: Path) -> Path:
    """The sample plant with a second measurement point on the backwash pump motor,
    registered like its first (same sensor, same sample rate)."""
    text = PLANT.read_text()
    start = text.index('[[machines]]\nid = "bwm-1"')
    first = text.index("  [[machines.points]]", start)
    end = text.index("  [[machines.modes]]", first)
    point = text[first:end].replace('id = "de-h"', 'id = "nde-h"')
    out = tmp_path / "plant-two-points.toml"
    out.write_text(text[:end] + point + text[end:])
    return out


def service(url: str, **kw) -> Service:
    return Service(settings_for(url), stale_check_s=0, **kw)


# ----------------------------------------------------------------------------- modes


@pytest.mark.parametrize("restart", [False, True], ids=["live", "restart"])
@pytest.mark.parametrize("edit", ["deleted by import --replace", "renamed through the API"])
def test_resonance_alarm_of_a_mode_taken_out_closes(plant_url: str, api: Api, tmp_path: Path,
                                                    edit: str, restart: bool) -> None:
    r = api.call("POST", "/machines/rwp-1/modes", NEAR_MODE)
    assert r.status_code == 201, r.get_data(as_text=True)
    msgs = waveforms("rwp-1")[-12:]
    svc = service(plant_url)
    try:
        raised = events_of(run_bounded(svc, msgs[:4]))
        assert ("motor frame@1x", "raised") in [(e["subject"], e["transition"]) for e in raised]
        assert (None, "resonance_proximity", "motor frame@1x") in open_alarms(plant_url, "rwp-1")
        if restart:
            svc.store.close()
        if edit.startswith("deleted"):
            out = import_file(plant_url, PLANT, replace=True)
            assert "rwp-1/motor frame" in out
        else:
            mid = next(m["id"] for m in api.call("GET", "/machines/rwp-1/modes").get_json()["items"]
                       if m["name"] == "motor frame")
            r = api.call("PUT", f"/machines/rwp-1/modes/{mid}", {"name": "motor frame B"})
            assert r.status_code == 200, r.get_data(as_text=True)
        if restart:
            svc = service(plant_url)
        events = events_of(run_bounded(svc, msgs[4:5]))
    finally:
        svc.store.close()
    closed = [e for e in events if e["subject"] == "motor frame@1x"]
    assert [(e["transition"], e["state"], e["evidence"]["reason"]) for e in closed] == [
        ("cleared", "cleared", MODE_REMOVED)]
    assert closed[0]["transition"] in TRANSITIONS
    assert (None, "resonance_proximity", "motor frame@1x") not in open_alarms(plant_url, "rwp-1")
    assert [(r[2], r[4]["reason"]) for r in closing_rows(plant_url, "rwp-1")] == [
        ("motor frame@1x", MODE_REMOVED)]


def test_a_renamed_mode_is_watched_under_its_new_name(plant_url: str, api: Api) -> None:
    r = api.call("POST", "/machines/rwp-1/modes", NEAR_MODE)
    assert r.status_code == 201, r.get_data(as_text=True)
    msgs = waveforms("rwp-1")[-12:]
    svc = service(plant_url)
    try:
        run_bounded(svc, msgs[:4])
        mid = next(m["id"] for m in api.call("GET", "/machines/rwp-1/modes").get_json()["items"]
                   if m["name"] == "motor frame")
        assert api.call("PUT", f"/machines/rwp-1/modes/{mid}", {"name": "motor frame B"}).status_code == 200
        run_bounded(svc, msgs[4:8])
    finally:
        svc.store.close()
    # The old name's alarm is closed; the same mode under its new name raises again
    # after `persistence` readings (a new alarm: nothing carried over by name).
    subjects = [a[2] for a in open_alarms(plant_url, "rwp-1")]
    assert "motor frame B@1x" in subjects and "motor frame@1x" not in subjects


# ----------------------------------------------------------------------------- points


@pytest.mark.parametrize("restart", [False, True], ids=["live", "restart"])
def test_alarms_of_a_retired_point_close_and_it_never_goes_stale(plant_url: str, tmp_path: Path,
                                                                 restart: bool) -> None:
    import_file(plant_url, plant_with_second_point(tmp_path), replace=False)
    bwm = waveforms("bwm-1")
    # The motor's last readings are stuck at zero (sample_streams/README.md): a flat-line
    # and dropout sensor fault (docs/alarms.md thresholds, common practice), here sent as
    # readings of the second point.
    stuck = on_point(bwm[-4:], "nde-h")
    healthy = bwm[-26:-22]  # 2026-03-31 and 04-01: before the signal stuck
    svc = service(plant_url)
    try:
        raised = events_of(run_bounded(svc, stuck))
        faults = sorted(e["subject"] for e in raised if e["point"] == "nde-h" and e["transition"] == "raised")
        assert "flat_line" in faults
        assert {a[0] for a in open_alarms(plant_url, "bwm-1")} == {"nde-h"}
        if restart:
            svc.store.close()
        out = import_file(plant_url, PLANT, replace=True)
        assert "bwm-1/nde-h" in out
        if restart:
            svc = service(plant_url)
        events = events_of(run_bounded(svc, healthy))
        # Ten days after the last reading: a retired point is not a silent one.
        later = parse_ts(json.loads(stuck[-1][1])["ts"]) + 10 * 86400.0
        svc.clock = lambda: later
        stale = svc.check_stale()
    finally:
        svc.store.close()
    closed = sorted((e["subject"], e["transition"], e["evidence"]["reason"]) for e in events if e["point"] == "nde-h")
    assert closed == sorted((s, "cleared", POINT_RETIRED) for s in faults)
    assert all(e["point"] != "nde-h" for e in stale)
    assert {(e["point"], e["subject"]) for e in stale} == {("de-h", "stale")}
    assert [a for a in open_alarms(plant_url, "bwm-1") if a[0] == "nde-h"] == []
    assert sorted((r[2], r[4]["reason"]) for r in closing_rows(plant_url, "bwm-1") if r[0] == "nde-h") == [
        (s, POINT_RETIRED) for s in faults]


# ----------------------------------------------------------------------------- machines


@pytest.mark.parametrize("restart", [False, True], ids=["live", "restart"])
def test_alarms_of_a_retired_machine_close(plant_url: str, tmp_path: Path, restart: bool) -> None:
    stuck = waveforms("bwm-1")[-4:]
    svc = service(plant_url)
    try:
        raised = events_of(run_bounded(svc, stuck))
        opened = sorted((e["point"], e["kind"], e["subject"]) for e in raised if e["transition"] == "raised")
        assert opened and open_alarms(plant_url, "bwm-1") == opened
        if restart:
            svc.store.close()
        out = import_file(plant_url, plant_without(tmp_path, "bwm-1"), replace=True)
        assert "bwm-1" in out
        if restart:
            svc = service(plant_url)
        events = svc.apply_registry_requests()
        again = svc.apply_registry_requests()
    finally:
        svc.store.close()
    assert sorted((e["point"], e["kind"], e["subject"], e["transition"], e["evidence"]["reason"])
                  for e in events) == [(*k, "cleared", MACHINE_RETIRED) for k in opened]
    assert again == []
    assert open_alarms(plant_url, "bwm-1") == []
    assert sorted(r[4]["reason"] for r in closing_rows(plant_url, "bwm-1")) == [MACHINE_RETIRED] * len(opened)
    # Closed once: a later start finds nothing more to do.
    svc = service(plant_url)
    try:
        assert svc.apply_registry_requests() == []
    finally:
        svc.store.close()


# ----------------------------------------------------------------------------- MQTT


@pytest.mark.broker
def test_closings_are_published_and_a_retired_machine_loses_its_status(fresh_mosquitto, plant_url: str,
                                                                       api: Api, tmp_path: Path) -> None:
    from broker import publish_many
    from service_helpers import Recorder, wait_for

    assert api.call("POST", "/machines/rwp-1/modes", NEAR_MODE).status_code == 201
    settings = load_settings(None, env={}, overrides={
        "broker.url": fresh_mosquitto.url, "database.url": plant_url, "broker.client_id": "svc-retire",
        "broker.reconnect_max_s": 1.0})
    alarms = Recorder(fresh_mosquitto.host, fresh_mosquitto.port, "whirlwatch/+/alarms")
    status = Recorder(fresh_mosquitto.host, fresh_mosquitto.port, "whirlwatch/+/status")
    svc = Service(settings, stale_check_s=0)
    svc.start()
    try:
        publish_many(fresh_mosquitto, waveforms("rwp-1")[-12:-8] + waveforms("bwm-1")[-4:])

        def raised(machine: str) -> bool:
            return any(e["machine"] == machine and e["transition"] == "raised" for e in alarms.json())

        assert wait_for(lambda: raised("rwp-1") and raised("bwm-1"), 30)
        assert wait_for(lambda: any(t == "whirlwatch/bwm-1/status" and p for t, p, _ in status.messages), 10)
        opened = {(e["machine"], e["subject"]) for e in alarms.json() if e["transition"] == "raised"}
        # One import deletes the added mode and retires the motor.
        import_file(plant_url, plant_without(tmp_path, "bwm-1"), replace=True)

        def cleared() -> set[tuple[str, str]]:
            return {(e["machine"], e["subject"]) for e in alarms.json() if e["transition"] == "cleared"}

        want = {k for k in opened if k[0] == "bwm-1"} | {("rwp-1", "motor frame@1x")}
        # Published by the periodic pass (every 0.5 s), with no further reading.
        assert wait_for(lambda: want <= cleared(), 15), (opened, cleared())
        reasons = {(e["machine"], e["evidence"]["reason"]) for e in alarms.json() if e["transition"] == "cleared"}
        assert reasons == {("rwp-1", MODE_REMOVED), ("bwm-1", MACHINE_RETIRED)}
        # docs/mqtt.md, "Status (retained)": an empty retained message removes a retired
        # machine's status; MQTT 5.0 section 3.3.1.3: a retained PUBLISH with a zero-length
        # payload removes the retained message of the topic.
        doc = (Path(__file__).resolve().parent.parent / "docs" / "mqtt.md").read_text(encoding="utf-8")
        assert "an empty retained message removes\nit: the service sends one for a machine retired" in doc
        assert wait_for(lambda: ("whirlwatch/bwm-1/status", b"") in [(t, p) for t, p, _ in status.messages], 10)
    finally:
        svc.stop()
        alarms.close()
        status.close()
    # A late subscriber gets the pump's status, and none for the retired motor.
    late = Recorder(fresh_mosquitto.host, fresh_mosquitto.port, "whirlwatch/+/status")
    try:
        wait_for(lambda: any(t == "whirlwatch/rwp-1/status" for t, _, _ in late.messages), 5)
        topics = {t for t, p, r in late.messages if r and p}
    finally:
        late.close()
    assert "whirlwatch/rwp-1/status" in topics and "whirlwatch/bwm-1/status" not in topics


# ----------------------------------------------------------------------------- the detector


def test_alarm_of_a_removed_excitation_closes_once() -> None:
    from dataclasses import replace

    from fixtures_db import small_registry

    from monitor.detection.evaluator import MachineEvaluator
    from monitor.model.readings import SpeedReading

    fan = small_registry().machine("fan-7")  # invented machine: inputs only
    ev = MachineEvaluator(fan)
    # At 9.2 Hz the 2x excitation sits on the 18.4 Hz frame mode: a separation margin of
    # 0 %, inside any required margin (API 684, docs/alarms.md).
    # Five speeds 30 s apart: dwelt the 60 s a raise needs at the third, raised at the fifth.
    raised = [t for i in range(5) for t in ev.observe_speed(SpeedReading("fan-7", 100.0 + 30.0 * i, 9.2))]
    assert [(t.alarm["subject"], t.name) for t in raised] == [("frame lateral@2x", "raised")]
    snap = json.loads(json.dumps(ev.snapshot()))
    # The same entry: nothing to close.
    assert MachineEvaluator.restore(fan, snap).close_orphaned_alarms(500.0) == []
    # 2x taken out of the excitation orders.
    again = MachineEvaluator.restore(replace(fan, excitation_orders=(1.0, 9.0)), snap)
    assert again.active_alarms()  # open until closed at the caller's time
    closed = again.close_orphaned_alarms(500.0)
    assert [(t.alarm["subject"], t.name, t.ts, t.evidence["reason"]) for t in closed] == [
        ("frame lateral@2x", "cleared", 500.0, "excitation removed from the registry")]
    assert again.active_alarms() == [] and again.close_orphaned_alarms(600.0) == []
