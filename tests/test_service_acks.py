"""An acknowledgement made in the dashboard reaches MQTT within seconds, not at the next
reading (issue 11: "An acknowledgement reaches MQTT late").

The running service, a private Mosquitto, a real store, and the dashboard's JSON API
through Flask's test client with an engineer's API token, as a maintenance system would
call it. No readings flow after the alarm is raised: the event must still come.
"""

from __future__ import annotations

import json
import time
from pathlib import Path

import pytest
from broker import PrivateBroker, publish_many
from fixtures_db import fresh_database
from service_helpers import (
    Recorder,
    measurement_count,
    plant_store,
    traffic,
    wait_for,
    waveform_keys,
)
from sqlalchemy import select

from dashboard import create_app
from monitor.config import load_settings
from monitor.service.periodic import ACK_SYNC_S
from monitor.service.service import Service
from monitor.store import Store
from monitor.store.auth import create_api_token, create_user
from monitor.store.models import Alarm, SpeedReadingRow

pytestmark = pytest.mark.broker

#: "Within a few seconds" (issue 11), for an acknowledgement looked for every ACK_SYNC_S.
PROMPT_S = 5.0


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def plant_url(request: pytest.FixtureRequest, tmp_path: Path):
    with fresh_database(request.param, tmp_path) as url:
        plant_store(url)
        yield url


def engineer_token(url: str) -> str:
    store = Store.open(url)
    try:
        with store.transaction() as s:
            create_user(s, "eng", "engineer-pass-1", "engineer")
            return create_api_token(s, "eng", "maintenance system")
    finally:
        store.close()


def speed_count(url: str) -> int:
    store = Store.open(url)
    try:
        with store.session() as s:
            return len(s.execute(select(SpeedReadingRow.ts)).all())
    finally:
        store.close()


def active_alarm(url: str, machine: str) -> Alarm | None:
    store = Store.open(url)
    try:
        with store.session() as s:
            return s.scalars(select(Alarm).where(Alarm.machine_id == machine, Alarm.state == "active")
                             .order_by(Alarm.id)).first()
    finally:
        store.close()


def test_dashboard_acknowledgement_is_published_within_seconds(
    fresh_mosquitto: PrivateBroker, plant_url: str
) -> None:
    assert ACK_SYNC_S < PROMPT_S
    # The motor's last weeks carry a stuck sensor: a sensor_fault alarm that stays active
    # (common practice: a flat signal is a failed sensor, docs/alarms.md).
    msgs = traffic("bwm-1", 130, None)
    token = engineer_token(plant_url)
    settings = load_settings(None, env={}, overrides={
        "broker.url": fresh_mosquitto.url, "database.url": plant_url, "broker.client_id": "svc-ack",
        "broker.reconnect_max_s": 1.0})
    svc = Service(settings, stale_check_s=0)
    svc.start()
    events = Recorder(fresh_mosquitto.host, fresh_mosquitto.port, "whirlwatch/bwm-1/alarms")
    app = create_app({"DATABASE_URL": plant_url, "SECRET_KEY": "test", "TESTING": True})
    try:
        publish_many(fresh_mosquitto, msgs)
        want = len(waveform_keys(msgs))
        assert wait_for(lambda: measurement_count(plant_url)[0] >= want, 60)
        alarm = active_alarm(plant_url, "bwm-1")
        assert alarm is not None, "the stuck sensor raised no alarm"
        time.sleep(2 * ACK_SYNC_S)  # idle: nothing more arrives from the plant
        client = app.test_client()
        t0 = time.monotonic()
        r = client.post(f"/api/v1/alarms/{alarm.id}/acknowledge", json={"comment": "cable ordered"},
                        headers={"Authorization": f"Bearer {token}"})
        assert r.status_code == 200, r.get_data(as_text=True)

        def acked() -> list[dict]:
            return [e for e in events.json() if e.get("transition") == "acknowledged"]

        assert wait_for(lambda: bool(acked()), PROMPT_S, 0.05), "no acknowledgement event within 5 s"
        took = time.monotonic() - t0
        (event,) = acked()
        assert event["ref"] == alarm.ref and event["acknowledged_by"] == "eng"
        assert event["state"] == "acknowledged" and event["ack_comment"] == "cable ordered"
        # The retained status already shows the alarm acknowledged.
        status = Recorder(fresh_mosquitto.host, fresh_mosquitto.port, "whirlwatch/bwm-1/status")
        assert wait_for(lambda: bool(status.messages), 5, 0.05)
        body = json.loads(status.messages[-1][1])
        status.close()
        assert {a["ref"]: a["state"] for a in body["active_alarms"]}[alarm.ref] == "acknowledged"
        # A later reading does not publish the acknowledgement again.
        speeds = speed_count(plant_url)
        publish_many(fresh_mosquitto, [("whirlwatch/bwm-1/speed",
                                        json.dumps({"ts": time.time(), "hz": 49.4}).encode())])
        assert wait_for(lambda: speed_count(plant_url) > speeds, 10, 0.05)
        time.sleep(2 * ACK_SYNC_S)
        assert len(acked()) == 1
    finally:
        app.extensions["whirlwatch_engine"].dispose()
        events.close()
        svc.stop()
    print(f"acknowledgement published {took:.2f} s after the API call")
