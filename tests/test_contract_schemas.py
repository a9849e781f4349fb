"""One alarm shape, published as JSON Schemas in docs/schemas/ (docs/alarms.md, "Transition
and alarm JSON"; docs/mqtt.md, "Status (retained)" and "Alarm events"), and what the
service and the API give held to them: the REST alarms, the alarm events and statuses of
the service's batch path and of its periodic passes (stale streams, acknowledgements).
Every MQTT message the broker tests receive is checked as it arrives
(tests/service_helpers.py ``Recorder``), and ``passage``/``bumptest --record --json`` in
tests/test_modes.py.

Sources: JSON Schema draft 2020-12 (Core and Validation); RFC 3339 section 5.6 (date-time);
OpenAPI 3.1.0 section 4.8.24 (a Schema Object is a JSON Schema 2020-12 superset).
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest
from contracts import NAMES, check_alarm, check_alarm_event, check_status, problems, schema
from dashboard_signin import make_app, seed_template, seeded_copy
from jsonschema import Draft202012Validator
from service_helpers import offline_service, plant_store, traffic

from monitor.io.streams import parse_ts
from monitor.store import Store
from monitor.store.auth import create_api_token

ROOT = Path(__file__).resolve().parent.parent
ALARMS_DOC = (ROOT / "docs" / "alarms.md").read_text(encoding="utf-8")
MQTT_DOC = (ROOT / "docs" / "mqtt.md").read_text(encoding="utf-8")


def json_blocks(text: str, after: str) -> list[dict]:
    section = text.split(after, 1)[1]
    return [json.loads(b) for b in re.findall(r"```json\n(.*?)```", section.split("\n## ")[0], flags=re.S)]


@pytest.mark.parametrize("name", NAMES)
def test_schemas_are_json_schema_2020_12(name):
    Draft202012Validator.check_schema(schema(name))


def test_formats_are_checked():
    # RFC 3339 section 5.6: "2026-03-04 10:00" (no T, no offset) is no date-time.
    body = json_blocks(ALARMS_DOC, "## Transition and alarm JSON")[0]
    assert problems("alarm-event.json", body) == []
    assert problems("alarm-event.json", {**body, "raised_at": "2026-03-04 10:00"})
    assert problems("alarm-event.json", {**body, "transition": {"name": "raised"}})
    assert problems("alarm-event.json", {**body, "id": "af-3/-/resonance_proximity/x#1"})


def test_the_documented_examples_are_of_the_schemas():
    (event,) = json_blocks(ALARMS_DOC, "## Transition and alarm JSON")
    check_alarm_event(event)
    check_alarm({k: v for k, v in event.items()
                 if k not in ("transition", "transition_at", "previous_severity", "reading_id", "ref")})
    (status,) = json_blocks(MQTT_DOC, "### Status (retained)")
    check_status(status)
    assert event["ref"] == status["active_alarms"][0]["ref"]


def test_the_api_description_carries_the_same_alarm():
    api = json.loads((ROOT / "dashboard" / "openapi.json").read_text(encoding="utf-8"))
    published = {k: v for k, v in schema("alarm.json").items() if k not in ("$schema", "$id", "title")}
    assert api["components"]["schemas"]["Alarm"] == published


def test_events_and_statuses_of_the_service(tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path / 'store.sqlite'}"
    plant_store(url)
    # The sample motor (sample_streams/README.md) ends stuck at zero: sensor faults raise;
    # ten days later its points are stale.
    readings = [m for m in traffic("bwm-1") if m[0].endswith("/waveform")]
    last = max(parse_ts(json.loads(p)["ts"]) for _, p in readings)
    now = [last + 60.0]
    svc = offline_service(url, clock=lambda: now[0])
    try:
        outs = svc.handle_batch(readings)
        now[0] = last + 10 * 86400.0
        stale = svc.check_stale()
    finally:
        svc.store.close()
    events = [e for o in outs for e in o.events] + stale
    statuses = [o.status for o in outs if o.status is not None]
    assert {e["transition"] for e in events} >= {"raised"} and statuses
    assert any(e["subject"] == "stale" for e in stale)
    for e in events:
        check_alarm_event(e)
    for s in statuses:
        check_status(s)
    # Each event names its alarm by database id and by ref, as the status does.
    refs = {a["ref"] for s in statuses for a in s["active_alarms"]}
    assert refs <= {e["ref"] for e in events}


@pytest.fixture()
def api(tmp_path_factory, tmp_path):
    url = seeded_copy(seed_template(tmp_path_factory.mktemp("schemas")), tmp_path)
    store = Store.open(url)
    try:
        with store.transaction() as s:
            token = create_api_token(s, "eng", "schema test")
    finally:
        store.close()
    app = make_app(url)
    yield app.test_client(), {"Authorization": f"Bearer {token}"}
    app.extensions["whirlwatch_engine"].dispose()


def test_rest_alarms(api) -> None:
    client, h = api
    items, cursor = [], None
    for _ in range(100):  # bounded: the seeded plant holds a handful of alarms
        page = client.get("/api/v1/alarms", query_string={"limit": 2, **({"cursor": cursor} if cursor else {})},
                          headers=h).get_json()
        items += page["items"]
        cursor = page["next"]
        if cursor is None:
            break
    assert items, "the seed raised no alarm"
    for a in items:
        check_alarm(a)
        detail = client.get(f"/api/v1/alarms/{a['id']}", headers=h).get_json()
        check_alarm(detail)
        assert detail["transitions"] and detail["id"] == a["id"]
    active = next(a for a in items if a["state"] == "active")
    acked = client.post(f"/api/v1/alarms/{active['id']}/acknowledge", json={"comment": "checked"}, headers=h)
    assert acked.status_code == 200
    check_alarm(acked.get_json())
    assert acked.get_json()["state"] == "acknowledged" and acked.get_json()["last_transition"] == "acknowledged"
