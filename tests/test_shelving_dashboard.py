"""Shelving and out of service in the dashboard and the JSON API (ISA-18.2 / IEC 62682
terms; docs/alarms.md, "Shelving and out of service"; docs/api.md): the refusals are one
sentence each (400 for a blank comment, a past time, a time beyond the longest shelving;
403 below the engineer role; 409 for a change that does not apply), every page shows what
is shelved and what is out of service, and each change leaves its audit row. Seeded
through the service's batch path (tests/dashboard_seed.py), on SQLite and PostgreSQL."""

from __future__ import annotations

import datetime as dt
import re

import pytest
from dashboard_seed import PASSWORDS, seed
from fixtures_db import fresh_database

from dashboard import create_app

BACKENDS = ["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)]


@pytest.fixture(scope="module", params=BACKENDS)
def db_url(request, tmp_path_factory):
    with fresh_database(request.param, tmp_path_factory.mktemp("shelf")) as url:
        seed(url, machines=2, readings_per_point=40)
        yield url


@pytest.fixture()
def client(db_url):
    # 24 h at most, so "over the maximum" is a day and a bit.
    a = create_app({"DATABASE_URL": db_url, "SECRET_KEY": "test", "TESTING": True, "MAX_SHELVE_HOURS": 24})
    yield a.test_client()
    a.extensions["whirlwatch_engine"].dispose()


def login(client, user: str) -> str:
    html = client.get("/login").get_data(as_text=True)
    tok = re.search(r'name="csrf-token" content="([^"]+)"', html).group(1)
    r = client.post("/login", data={"username": user, "password": PASSWORDS[user], "csrf_token": tok})
    assert r.status_code == 302
    html = client.get("/").get_data(as_text=True)
    return re.search(r'name="csrf-token" content="([^"]+)"', html).group(1)


def refused(resp, status: int, words: str) -> None:
    assert resp.status_code == status, resp.get_data(as_text=True)
    msg = resp.get_json()["error"]["message"]
    assert words in msg and msg.count(".") <= 2, msg  # one sentence naming what was wrong


def later(**kw) -> str:
    return (dt.datetime.now(dt.UTC) + dt.timedelta(**kw)).isoformat().replace("+00:00", "Z")


def open_alarm(client) -> dict:
    items = client.get("/api/v1/alarms?state=open&limit=500").get_json()["items"]
    return next(a for a in items if not a["shelved"])


def audit_actions(client, action: str) -> list[dict]:
    return client.get(f"/api/v1/audit?action={action}").get_json()["items"]


def test_shelve_refusals_then_shelve_show_and_unshelve(client):
    tok = login(client, "vic")
    a = open_alarm(client)
    url = f"/api/v1/alarms/{a['id']}/shelve"
    refused(client.post(url, json={"until": later(hours=1), "comment": "x"}, headers={"X-CSRFToken": tok}),
            403, "engineer role")
    client.post("/logout", data={"csrf_token": tok})
    tok = login(client, "eng")
    h = {"X-CSRFToken": tok}
    refused(client.post(url, json={"until": later(hours=1), "comment": "  "}, headers=h), 400, "'comment' is required")
    refused(client.post(url, json={"until": later(hours=-1), "comment": "pump swap"}, headers=h), 400,
            "must lie in the future")
    refused(client.post(url, json={"until": later(hours=25), "comment": "pump swap"}, headers=h), 400,
            "at most 24 hours ahead")
    refused(client.post(url, json={"comment": "pump swap"}, headers=h), 400, "'until' is required")
    refused(client.post(url, json={"until": "tomorrow", "comment": "pump swap"}, headers=h), 400, "'until'")
    assert not client.get(f"/api/v1/alarms/{a['id']}").get_json()["shelved"]  # nothing stored

    until = later(hours=2)
    r = client.post(url, json={"until": until, "comment": "repair booked"}, headers=h)
    assert r.status_code == 200, r.get_data(as_text=True)
    body = r.get_json()
    assert body["shelved"] and body["shelved_by"] == "eng" and body["shelve_comment"] == "repair booked"
    assert body["state"] == a["state"] and body["last_transition"] == a["last_transition"]
    d = client.get(f"/api/v1/alarms/{a['id']}").get_json()
    assert [(t["transition"], t["shelved"], t["user"]) for t in d["transitions"]][-1] == ("shelved", True, "eng")
    # Shown as shelved on every alarm list and page.
    for page in ("/alarms/", f"/machines/{a['machine']}", f"/alarms/{a['id']}"):
        html = client.get(page).get_data(as_text=True)
        assert "shelved until" in html, page
    assert "Unshelve now" in client.get(f"/alarms/{a['id']}").get_data(as_text=True)

    r = client.post(f"/api/v1/alarms/{a['id']}/unshelve", headers=h)
    assert r.status_code == 200 and not r.get_json()["shelved"]
    refused(client.post(f"/api/v1/alarms/{a['id']}/unshelve", headers=h), 409, "is not shelved")
    last = client.get(f"/api/v1/alarms/{a['id']}").get_json()["transitions"][-1]
    assert (last["transition"], last["user"]) == ("unshelved", "eng")


def test_audit_rows_of_shelving(client):
    tok = login(client, "eng")
    a = open_alarm(client)
    h = {"X-CSRFToken": tok}
    assert client.post(f"/api/v1/alarms/{a['id']}/shelve", json={"until": later(hours=1), "comment": "known"},
                       headers=h).status_code == 200
    assert client.post(f"/api/v1/alarms/{a['id']}/unshelve", headers=h).status_code == 200
    client.post("/logout", data={"csrf_token": tok})
    login(client, "ada")
    shelves = [e for e in audit_actions(client, "alarm_shelve") if e["target"] == str(a["id"])]
    unshelves = [e for e in audit_actions(client, "alarm_unshelve") if e["target"] == str(a["id"])]
    assert shelves and shelves[0]["actor"] == "eng" and shelves[0]["detail"]["comment"] == "known"
    assert unshelves and unshelves[0]["actor"] == "eng"


def test_shelve_form_refuses_a_blank_comment_in_one_sentence(client):
    tok = login(client, "eng")
    a = open_alarm(client)
    # A form without its CSRF token is refused before anything is read.
    assert client.post(f"/alarms/{a['id']}/shelve", data={"until": "2099-01-01T00:00", "comment": "x"}).status_code == 400
    r = client.post(f"/alarms/{a['id']}/shelve", data={"csrf_token": tok, "until": "2099-01-01T00:00", "comment": " "},
                    follow_redirects=True)
    assert "Field &#39;comment&#39; is required: say why the alarm is shelved." in r.get_data(as_text=True)
    local = (dt.datetime.now(dt.UTC) + dt.timedelta(hours=3)).strftime("%Y-%m-%dT%H:%M")  # TIME_ZONE is UTC here
    r = client.post(f"/alarms/{a['id']}/shelve", data={"csrf_token": tok, "until": local, "comment": "by form"},
                    follow_redirects=True)
    assert f"Alarm {a['id']} shelved." in r.get_data(as_text=True)
    assert client.get(f"/api/v1/alarms/{a['id']}").get_json()["shelve_comment"] == "by form"
    client.post(f"/api/v1/alarms/{a['id']}/unshelve", headers={"X-CSRFToken": tok})


def test_out_of_service_refusals_banner_and_return(client):
    tok = login(client, "vic")
    url = "/api/v1/machines/fan-001/out-of-service"
    refused(client.post(url, json={"comment": "bearing change"}, headers={"X-CSRFToken": tok}), 403, "engineer role")
    client.post("/logout", data={"csrf_token": tok})
    tok = login(client, "eng")
    h = {"X-CSRFToken": tok}
    refused(client.post(url, json={"comment": ""}, headers=h), 400, "'comment' is required")
    refused(client.post(url, json={"comment": "x", "until": later(minutes=-5)}, headers=h), 400, "must lie in the future")
    refused(client.post(url, json={"comment": "x", "point": "nope"}, headers=h), 404, "has no point 'nope'")
    refused(client.post("/api/v1/machines/nope/out-of-service", json={"comment": "x"}, headers=h), 404, "No machine")
    refused(client.post("/api/v1/machines/fan-001/return-to-service", headers=h), 409, "is not out of service")
    assert client.get("/api/v1/out-of-service").get_json()["items"] == []

    r = client.post(url, json={"comment": "bearing change", "until": later(days=2)}, headers=h)
    assert r.status_code == 201, r.get_data(as_text=True)
    period = r.get_json()
    assert (period["machine"], period["point"], period["by"], period["ended_at"]) == ("fan-001", None, "eng", None)
    refused(client.post(url, json={"comment": "another job"}, headers=h), 409, "out of service already")
    assert [p["id"] for p in client.get("/api/v1/out-of-service").get_json()["items"]] == [period["id"]]
    # Shown on every page: the overview, a machine page, the alarms.
    for page in ("/", "/machines/fan-000", "/machines/fan-001", "/alarms/"):
        html = client.get(page).get_data(as_text=True)
        assert 'id="planned-work"' in html and 'data-out-of-service="fan-001"' in html, page
    assert "Return to service" in client.get("/machines/fan-001").get_data(as_text=True)

    r = client.post("/api/v1/machines/fan-001/return-to-service", headers=h)
    assert r.status_code == 200
    (ended,) = r.get_json()["items"]
    assert ended["id"] == period["id"] and ended["ended_by"] == "eng" and ended["ended_at"]
    assert 'id="planned-work"' not in client.get("/").get_data(as_text=True)
    client.post("/logout", data={"csrf_token": tok})
    login(client, "ada")
    puts = [e for e in audit_actions(client, "out_of_service") if e["detail"].get("id") == period["id"]]
    returns = [e for e in audit_actions(client, "return_to_service") if e["detail"].get("id") == period["id"]]
    assert puts[0]["target"] == "fan-001" and puts[0]["detail"]["comment"] == "bearing change"
    assert returns[0]["actor"] == "eng"
