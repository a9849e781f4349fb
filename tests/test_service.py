"""The service end to end: a private Mosquitto, a real SQLite (and PostgreSQL) store, the
sample plant's traffic published as sensors would, and a subscriber on the outputs."""

from __future__ import annotations

import json
import time
from pathlib import Path

import pytest
from broker import PrivateBroker, publish_many
from service_helpers import (
    Recorder,
    measurement_count,
    plant_store,
    traffic,
    wait_for,
    waveform_keys,
)
from sqlalchemy import select

from monitor.config import load_settings
from monitor.service.service import Service
from monitor.store import Store
from monitor.store.models import Alarm, DeadLetter

pytestmark = pytest.mark.broker


def make_service(broker: PrivateBroker, url: str, client_id: str = "svc-test", **kw) -> Service:
    settings = load_settings(None, env={}, overrides={
        "broker.url": broker.url, "database.url": url, "broker.client_id": client_id,
        "broker.reconnect_max_s": 1.0,
    })
    svc = Service(settings, **kw)
    svc.start()
    return svc


@pytest.fixture()
def sqlite_url(tmp_path: Path) -> str:
    url = f"sqlite:///{tmp_path / 'store.sqlite'}"
    plant_store(url)
    return url


def alarms(url: str) -> list[Alarm]:
    store = Store.open(url)
    try:
        with store.session() as s:
            return list(s.scalars(select(Alarm)))
    finally:
        store.close()


def test_end_to_end_alarms_and_outputs(fresh_mosquitto: PrivateBroker, sqlite_url: str) -> None:
    # The fan's commissioning run-up crosses its 15.5 Hz pedestal mode with 1x; the motor's
    # last weeks carry a flat (stuck) sensor signal.
    fan = traffic("ef-2", 0, 60)
    motor = traffic("bwm-1", 130, None)
    published = fan + motor
    alarms_seen = Recorder(fresh_mosquitto.host, fresh_mosquitto.port, "whirlwatch/+/alarms")
    svc = make_service(fresh_mosquitto, sqlite_url)
    try:
        publish_many(fresh_mosquitto, published)
        want = len(waveform_keys(published))
        assert wait_for(lambda: measurement_count(sqlite_url)[0] >= want, 60)
        time.sleep(0.5)
    finally:
        svc.stop()
    rows, distinct = measurement_count(sqlite_url)
    assert rows == distinct == want  # every published waveform exactly once
    rows_a = alarms(sqlite_url)
    kinds = {(a.machine_id, a.kind) for a in rows_a}
    # API 684 rule: with amplification factor 1/(2*0.025) = 20 the required separation
    # margin is about 16 %; 1x passing through the mode's frequency lies inside it.
    assert ("ef-2", "resonance_proximity") in kinds
    # A signal stuck at zero is a failed sensor, not a quiet machine (common practice).
    assert any(a.machine_id == "bwm-1" and a.kind == "sensor_fault" and a.subject == "flat_line"
               for a in rows_a)
    # Every stored transition was published as an event with the REST alarm shape.
    events = alarms_seen.json()
    alarms_seen.close()
    assert events, "no alarm events were published"
    for e in events:
        assert {"id", "machine", "kind", "severity", "state", "transition", "raised_at"} <= set(e)
    assert {(e["machine"], e["kind"]) for e in events} >= {("ef-2", "resonance_proximity"),
                                                           ("bwm-1", "sensor_fault")}
    store = Store.open(sqlite_url)
    with store.session() as s:
        from monitor.store.models import AlarmTransitionRow
        n_trans = len(list(s.scalars(select(AlarmTransitionRow))))
    store.close()
    assert len(events) == n_trans
    # Retained status: a late subscriber gets it at once.
    status = Recorder(fresh_mosquitto.host, fresh_mosquitto.port, "whirlwatch/+/status")
    assert wait_for(lambda: len(status.messages) >= 2, 5, 0.05)
    got = {json.loads(p)["machine"]: json.loads(p) for _, p, retained in status.messages if retained}
    status.close()
    assert set(got) >= {"ef-2", "bwm-1"}
    assert {"state", "speed_hz", "nearest_margin", "zone", "active_alarms"} <= set(got["ef-2"])
    assert got["bwm-1"]["state"] != "normal"  # the sensor-fault alarm is still active


def test_broker_restart_mid_stream_loses_nothing(fresh_mosquitto: PrivateBroker, sqlite_url: str) -> None:
    msgs = traffic("rwp-1", 0, 80)
    svc = make_service(fresh_mosquitto, sqlite_url)
    try:
        publish_many(fresh_mosquitto, msgs[:40])
        fresh_mosquitto.restart()  # clean stop: Mosquitto saves its persistence file
        publish_many(fresh_mosquitto, msgs[40:])
        want = len(waveform_keys(msgs))
        assert wait_for(lambda: measurement_count(sqlite_url)[0] >= want, 60)
    finally:
        svc.stop()
    assert measurement_count(sqlite_url) == (want, want)
    assert svc.source is not None and svc.source.stats.connects >= 2


def bad_inputs(good: bytes) -> list[tuple[str, bytes, str]]:
    """(topic, payload, reason of docs/mqtt.md) for the plant's fan, built from a good one."""
    body = json.loads(good)
    wave = "whirlwatch/ef-2/de-h/waveform"

    def w(**changes) -> bytes:
        b = dict(body)
        for k, v in changes.items():
            if v is None:
                b.pop(k, None)
            else:
                b[k] = v
        return json.dumps(b).encode()

    return [
        (wave, b"\xff\xfe not text", "not_utf8"),
        (wave, b"{ts: 1", "not_json"),
        (wave, b"[1, 2]", "not_object"),
        ("whirlwatch/zz-9/de-h/waveform", good, "unknown_machine"),
        ("whirlwatch/ef-2/zz/waveform", good, "unknown_point"),
        (wave, w(samples_f32=None, samples=[0.5] * 10), "samples_too_few"),
        (wave, w(ts=None), "ts_missing"),
        (wave, w(ts="2026-05-28T10:00:00"), "ts_no_timezone"),
        (wave, w(ts=time.time() + 86400), "ts_future"),
        (wave, w(ts=time.time() - 90 * 86400), "ts_too_old"),
        (wave, w(fs="fast"), "fs_type"),
        (wave, w(fs=-1), "fs_not_positive"),
        (wave, w(fs=1e12), "fs_absurd"),
        (wave, w(unit="furlong"), "unit_unknown"),
        (wave, w(unit="mm/s"), "unit_wrong_quantity"),
        (wave, w(samples_f32=None), "samples_missing"),
        (wave, w(samples_f32="###"), "samples_f32_base64"),
        (wave, w(samples_f32="AAAA" * 3 + "AA=="), "samples_f32_length"),
        (wave, w(samples_f32=None, samples=[]), "samples_empty"),
        (wave, w(samples_f32=None, samples=[1, "x"] * 40), "samples_not_numeric"),
        ("whirlwatch/ef-2/speed", json.dumps({"ts": time.time(), "rpm": -5}).encode(), "speed_negative"),
        ("whirlwatch/ef-2/speed", json.dumps({"ts": time.time()}).encode(), "speed_missing"),
    ]


def test_bad_input_rejected_while_good_data_flows(fresh_mosquitto: PrivateBroker, sqlite_url: str) -> None:
    good = traffic("ab-1", 0, 30)
    bad = bad_inputs(good[0][1])
    mixed: list[tuple[str, bytes]] = []
    for i, (topic, payload) in enumerate(good):
        mixed.append((topic, payload))
        if i < len(bad):
            mixed.append(bad[i][:2])
    mixed += [b[:2] for b in bad[len(good):]]
    svc = make_service(fresh_mosquitto, sqlite_url)
    try:
        publish_many(fresh_mosquitto, mixed)
        store = Store.open(sqlite_url)

        def dead() -> list[DeadLetter]:
            with store.session() as s:
                return list(s.scalars(select(DeadLetter)))

        want = len(waveform_keys(good))
        ok = wait_for(lambda: len(dead()) >= len(bad) and measurement_count(sqlite_url)[0] >= want, 60)
        assert ok, (sorted(d.reason for d in dead()), measurement_count(sqlite_url), want)
        letters = dead()
        store.close()
    finally:
        svc.stop()
    assert sorted(d.reason for d in letters) == sorted(r for _, _, r in bad)
    assert measurement_count(sqlite_url) == (want, want)
    assert all(d.payload_head for d in letters if d.payload_size)
    assert svc.rejections.total == len(bad)
