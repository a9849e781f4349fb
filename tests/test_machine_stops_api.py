"""Announced stops through the dashboard's JSON API (Flask test client, real SQLite seeded
through the service's batch path, tests/dashboard_seed.py): an engineer announces a
planned stop until a time, the overview and the machine show the machine stopped while it
is in force, and ending it takes that back (docs/api.md, "Planned stops")."""

from __future__ import annotations

import datetime as dt
import re

import pytest
from dashboard_seed import PASSWORDS, seed
from fixtures_db import fresh_database

from dashboard import create_app
from monitor.model.timefmt import iso_utc


@pytest.fixture(scope="module")
def db_url(tmp_path_factory):
    with fresh_database("sqlite", tmp_path_factory.mktemp("stops")) as url:
        seed(url, machines=2, readings_per_point=6, detected=1)
        yield url


@pytest.fixture()
def client(db_url):
    app = create_app({"DATABASE_URL": db_url, "SECRET_KEY": "test", "TESTING": True})
    yield app.test_client()
    app.extensions["whirlwatch_engine"].dispose()


def login(client, user: str) -> str:
    tok = re.search(r'name="csrf-token" content="([^"]+)"', client.get("/login").get_data(as_text=True)).group(1)
    r = client.post("/login", data={"username": user, "password": PASSWORDS[user], "csrf_token": tok})
    assert r.status_code == 302
    return re.search(r'name="csrf-token" content="([^"]+)"', client.get("/").get_data(as_text=True)).group(1)


def overview_item(client, machine: str) -> dict:
    items = client.get("/api/v1/machines?limit=50").get_json()["items"]
    return next(m for m in items if m["id"] == machine)


def test_an_announced_stop_shows_the_machine_stopped_until_it_is_ended(client) -> None:
    tok = login(client, "eng")
    h = {"X-CSRFToken": tok}
    until = iso_utc(dt.datetime.now(dt.UTC).timestamp() + 8 * 3600)
    r = client.post("/api/v1/machines/fan-000/stops", json={"until": until, "comment": "coupling change"}, headers=h)
    assert r.status_code == 201, r.get_data(as_text=True)
    stop = r.get_json()
    assert stop["current"] and stop["announced_by"] == "eng" and stop["ended_at"] is None
    listed = client.get("/api/v1/machines/fan-000/stops?current=true").get_json()["items"]
    assert [s["id"] for s in listed] == [stop["id"]]
    item = overview_item(client, "fan-000")
    assert item["running"] == "stopped" and item["stop_announced"] is True
    assert overview_item(client, "fan-001")["stop_announced"] is False
    detail = client.get("/api/v1/machines/fan-000").get_json()["running"]
    assert detail["state"] == "stopped" and detail["stop_announced"] and detail["stops"][0]["id"] == stop["id"]
    page = client.get("/machines/fan-000").get_data(as_text=True)
    assert 'id="stops-panel"' in page and 'id="stop-form"' in page and 'id="fact-running"' in page

    r = client.post(f"/api/v1/machines/fan-000/stops/{stop['id']}/end", json={}, headers=h)
    assert r.status_code == 200 and r.get_json()["ended_by"] == "eng" and not r.get_json()["current"]
    assert client.get("/api/v1/machines/fan-000/stops?current=true").get_json()["items"] == []
    item = overview_item(client, "fan-000")
    assert item["stop_announced"] is False and item["running"] == "running"  # the service's judgement


@pytest.mark.parametrize("body, status, field", [
    # Malformed: 400. Well formed but not fitting the clock or the length limits: 409.
    ({"comment": "no end"}, 400, "'until'"),
    ({"until": "", "comment": "no end"}, 400, "'until'"),
    ({"until": "2999-01-01T00:00:00Z", "comment": "   "}, 400, "'comment'"),
    ({"until": "tomorrow", "comment": "x"}, 400, "'until'"),
    ({"until": "2999-01-01T00:00:00Z", "comment": "x", "why": "y"}, 400, "'why'"),
    ({"until": "2020-01-01T00:00:00Z", "comment": "old"}, 409, "'until'"),
    ({"until": "2999-01-01T00:00:00Z", "comment": "far", "from": "2998-12-01T00:00:00Z"}, 409, "'from'"),
    ({"until": "2999-01-01T00:00:00Z", "comment": "long"}, 409, "92 days"),
])
def test_a_stop_that_cannot_be_announced_is_refused_naming_the_field(client, body, status, field) -> None:
    h = {"X-CSRFToken": login(client, "eng")}
    r = client.post("/api/v1/machines/fan-000/stops", json=body, headers=h)
    assert r.status_code == status and field in r.get_json()["error"]["message"], r.get_data(as_text=True)


def test_only_an_engineer_announces_and_only_known_machines(client) -> None:
    h = {"X-CSRFToken": login(client, "vic")}
    until = iso_utc(dt.datetime.now(dt.UTC).timestamp() + 3600)
    assert client.post("/api/v1/machines/fan-000/stops", json={"until": until, "comment": "x"},
                       headers=h).status_code == 403
    assert client.get("/api/v1/machines/nope/stops").status_code == 404
    assert client.post("/api/v1/machines/fan-000/stops/999/end", json={}, headers=h).status_code == 403
