"""What the JSON API answers to inputs an integrator or an attacker may send: ids beyond
any database id, fields of the wrong JSON type, writes without credentials, a wrong
method; and the error codes docs/api.md lists are exactly those the API can answer.

Sources: docs/api.md ("Errors", "Modes: bounds"); RFC 9110 section 15.5.2 (404),
15.5.6 (405 and its Allow header), 15.5.2/11.6.1 (401 with WWW-Authenticate); ISO/IEC
9075 (SQL) BIGINT as a signed 64-bit integer, from memory.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest
from dashboard_signin import make_app, seed_template, seeded_copy
from sqlalchemy import func, select

from dashboard.errors import CODES, DashboardError
from monitor.store import Store
from monitor.store.auth import create_api_token
from monitor.store.models import Mode

ROOT = Path(__file__).resolve().parent.parent
API_DOC = (ROOT / "docs" / "api.md").read_text(encoding="utf-8")
#: 2^63: the first whole number a signed 64-bit BIGINT column cannot hold.
BEYOND_BIGINT = 2**63


@pytest.fixture(scope="module")
def template(tmp_path_factory) -> Path:
    return seed_template(tmp_path_factory.mktemp("api-inputs"))


@pytest.fixture()
def env(template, tmp_path):
    url = seeded_copy(template, tmp_path)
    store = Store.open(url)
    try:
        with store.transaction() as s:
            token = create_api_token(s, "eng", "inputs test")
    finally:
        store.close()
    app = make_app(url)
    app.testing = False  # a server error is answered, not raised into the test
    yield app.test_client(), {"Authorization": f"Bearer {token}"}, url
    app.extensions["whirlwatch_engine"].dispose()


def error(resp, status: int) -> dict:
    assert resp.status_code == status, (resp.status_code, resp.get_data(as_text=True))
    body = resp.get_json()
    assert set(body) == {"error"} and body["error"]["status"] == status
    return body["error"]


def machine_id(client, headers) -> str:
    return client.get("/api/v1/machines", headers=headers).get_json()["items"][0]["id"]


def mode_count(url: str) -> int:
    store = Store.open(url)
    try:
        with store.session() as s:
            return int(s.scalar(select(func.count()).select_from(Mode)) or 0)
    finally:
        store.close()


def test_ids_beyond_bigint_name_nothing(env):
    client, h, _ = env
    m = machine_id(client, h)
    # Each of these answered 500 (OverflowError binding the id) before.
    for method, path in [("GET", f"/api/v1/spectra/{BEYOND_BIGINT}"),
                         ("GET", f"/api/v1/alarms/{BEYOND_BIGINT}"),
                         ("POST", f"/api/v1/alarms/{BEYOND_BIGINT}/acknowledge"),
                         ("PUT", f"/api/v1/machines/{m}/modes/{BEYOND_BIGINT}")]:
        resp = client.open(path, method=method, headers=h, json={"comment": "x"} if method != "GET" else None)
        assert error(resp, 404)["code"] == "not_found", path  # RFC 9110, 15.5.5
    # The largest BIGINT is an id like any other: no such alarm.
    assert error(client.get(f"/api/v1/alarms/{BEYOND_BIGINT - 1}", headers=h), 404)["code"] == "not_found"
    # A cursor lists the ids below it (docs/api.md): one beyond any id lists from the newest.
    newest = client.get("/api/v1/alarms", headers=h).get_json()["items"]
    assert client.get("/api/v1/alarms", query_string={"cursor": str(BEYOND_BIGINT)}, headers=h).get_json()[
        "items"] == newest
    for cursor in ("0", "1_0", " 5", "-1", "1" * 20):
        e = error(client.get("/api/v1/alarms", query_string={"cursor": cursor}, headers=h), 400)
        assert "'cursor'" in e["message"]


@pytest.mark.parametrize(("field", "value"), [
    ("name", 123), ("name", {"a": 1}), ("name", ["x"]), ("source", {"a": 1}), ("source", 7),
    ("frequency_hz", "30"), ("damping_ratio", "0.05"), ("required_margin_pct", True),
])
def test_wrong_json_types_are_refused_not_converted(env, field, value):
    client, h, url = env
    m = machine_id(client, h)
    before = mode_count(url)
    body = {"name": "typed", "frequency_hz": 30.0, "damping_ratio": 0.05, field: value}
    e = error(client.post(f"/api/v1/machines/{m}/modes", json=body, headers=h), 400)
    # docs/api.md, "Errors": the message names the field; nothing is stored.
    assert e["code"] == "bad_request" and f"'{field}'" in e["message"]
    assert mode_count(url) == before


def test_a_number_beyond_a_double_is_a_bad_request(env):
    client, h, url = env
    m = machine_id(client, h)
    body = '{"name": "huge", "frequency_hz": 1' + "0" * 400 + "}"
    e = error(client.post(f"/api/v1/machines/{m}/modes", data=body, content_type="application/json",
                          headers=h), 400)
    assert "'frequency_hz'" in e["message"] and len(e["message"]) < 300


def test_writes_without_credentials_are_unauthorised(env):
    client, h, _ = env
    m = machine_id(client, h)
    for method, path, body in [("POST", "/api/v1/alarms/1/acknowledge", {"comment": "x"}),
                               ("POST", f"/api/v1/machines/{m}/modes", {"name": "x", "frequency_hz": 9.0}),
                               ("PUT", f"/api/v1/machines/{m}/modes/1", {"name": "x"}),
                               ("POST", f"/api/v1/machines/{m}/baseline", {"comment": "x"})]:
        resp = client.open(path, method=method, json=body)
        # RFC 9110, 15.5.2: 401 with a challenge, not a CSRF refusal (docs/api.md, "Errors").
        assert error(resp, 401)["code"] == "unauthorised", path
        assert resp.headers["WWW-Authenticate"].startswith("Bearer")


def test_a_wrong_method_says_which_are_allowed(env):
    client, h, _ = env
    for path, allowed in [("/api/v1/machines", {"GET", "HEAD", "OPTIONS"}),
                          ("/api/v1/alarms/1/acknowledge", {"POST", "OPTIONS"}),
                          ("/api/v1/openapi.json", {"GET", "HEAD", "OPTIONS"})]:
        for headers in ({}, h):
            resp = client.delete(path, headers=headers)
            assert error(resp, 405)["code"] == "method_not_allowed"
            # RFC 9110, 15.5.6: "MUST generate an Allow header field".
            assert set(re.split(r",\s*", resp.headers["Allow"])) == allowed, path
    assert client.delete("/alarms/").status_code == 405 and "GET" in client.delete("/alarms/").headers["Allow"]


def documented_codes() -> dict[str, str]:
    section = API_DOC.split("\n## Errors\n")[1].split("\n## ")[0]
    return dict(re.findall(r"^\| `([a-z_]+)` \| ([^|]+?) \|", section, flags=re.M))


def test_docs_list_every_error_code():
    docs = documented_codes()
    assert set(docs) == set(CODES)  # docs/api.md, "Errors"
    for code, status in CODES.items():
        if status is not None:
            assert docs[code] == str(status), code
    raised = {cls.code for cls in _subclasses(DashboardError)} | {DashboardError.code}
    assert raised <= set(CODES)


def _subclasses(cls: type) -> set[type]:
    out = set()
    for sub in cls.__subclasses__():
        out |= {sub} | _subclasses(sub)
    return out


@pytest.mark.parametrize(("zeta", "required"), [(0.8, {0.0}), (5e-324, {16.0, 26.0})])
def test_any_damping_ratio_in_bounds_leaves_the_margins_computable(env, zeta, required):
    # AF = 1 / (2 zeta) (Thomson, half-power bandwidth): below 1 for zeta > 0.5, where API
    # 684 asks no margin (AF < 2.5); beyond any float for the smallest double, where its
    # margins are at their caps, 16 % and 26 %. Either mode answered 500 on every machine
    # read before.
    client, h, _ = env
    m = machine_id(client, h)
    body = {"name": "damped", "frequency_hz": 30.0, "damping_ratio": zeta}
    assert client.post(f"/api/v1/machines/{m}/modes", json=body, headers=h).status_code == 201
    assert client.get("/api/v1/machines", headers=h).status_code == 200
    resp = client.get(f"/api/v1/machines/{m}", headers=h)
    assert "Infinity" not in resp.get_data(as_text=True)  # RFC 8259: no such JSON number
    rows = [r for r in resp.get_json()["margins"] if r["mode"] == "damped"]
    assert rows and {r["required_pct"] for r in rows} <= required


@pytest.mark.parametrize("value", ["2026-03-04T10:00:00Z", "2026-03-04t10:00:00.5+05:30", "2026-03-04",
                                   "1780000000", "1780000000.25", "",
                                   "0001-01-01T00:00:00+05:00", "9999-12-31T23:59:59-05:00"])
def test_query_times_in_every_documented_form(env, value):
    # RFC 3339 section 5.6 (date-time, "T" and "Z" in either case), a date, epoch seconds,
    # empty for "not given" (docs/api.md, dashboard/openapi.json).
    client, h, _ = env
    m = machine_id(client, h)
    for path in ("/api/v1/alarms", f"/api/v1/machines/{m}/trends"):
        assert client.get(path, query_string={"from": value, "to": value}, headers=h).status_code == 200, path


@pytest.mark.parametrize("value", ["yesterday", "nan", "1e9", "-5", "2026-13-01", "2026-03-04T25:00:00Z",
                                   "2026-03-04T10:00", "2026-02-30"])
def test_query_times_in_no_documented_form(env, value):
    client, h, _ = env
    e = error(client.get("/api/v1/alarms", query_string={"from": value}, headers=h), 400)
    assert "'from'" in e["message"]
