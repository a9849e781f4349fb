"""Dashboard and JSON API through the Flask test client on a real temporary SQLite file."""

from __future__ import annotations

import json
import re

import pytest
from sqlalchemy import event

from dashboard import create_app
from tests.dashboard_seed import PASSWORDS, seed


@pytest.fixture(scope="module")
def db_url(tmp_path_factory):
    path = tmp_path_factory.mktemp("dash") / "store.sqlite"
    url = f"sqlite:///{path}"
    seed(url, machines=4, readings_per_point=60, names={1: "<script>alert(1)</script>"})
    return url


@pytest.fixture()
def app(db_url):
    return create_app({"DATABASE_URL": db_url, "SECRET_KEY": "test", "TESTING": True})


@pytest.fixture()
def client(app):
    return app.test_client()


class Auth:
    def __init__(self, client):
        self.client = client

    def csrf(self, path="/login"):
        html = self.client.get(path).get_data(as_text=True)
        return re.search(r'name="csrf-token" content="([^"]+)"', html).group(1)

    def login(self, user):
        tok = self.csrf()
        r = self.client.post("/login", data={"username": user, "password": PASSWORDS[user], "csrf_token": tok})
        assert r.status_code == 302, r.get_data(as_text=True)
        return self.csrf("/")


@pytest.fixture()
def auth(client):
    return Auth(client)


def _err(resp, status):
    assert resp.status_code == status, resp.get_data(as_text=True)
    body = resp.get_json()
    assert set(body) == {"error"} and set(body["error"]) == {"status", "code", "message"}
    assert body["error"]["status"] == status


def test_reads_need_auth(client):
    _err(client.get("/api/v1/machines"), 401)
    _err(client.get("/api/v1/machines", headers={"Authorization": "Bearer nope"}), 401)
    _err(client.get("/api/v1/machines", headers={"Authorization": "Basic abc"}), 401)
    assert client.get("/").status_code == 302


def test_overview_and_machine(client, auth):
    auth.login("vic")
    items = client.get("/api/v1/machines").get_json()["items"]
    assert len(items) == 4
    m = items[0]
    assert m["state"] == "alarm" and m["active_alarms"] == 1
    # Separation margin = |f_exc - f_mode| / f_mode (DESIGN.md section 4; API 684 convention).
    nm = m["nearest_margin"]
    assert nm["margin_pct"] == pytest.approx(abs(nm["excitation_hz"] - nm["mode_hz"]) / nm["mode_hz"] * 100)
    d = client.get("/api/v1/machines/fan-000").get_json()
    assert {p["id"] for p in d["points"]} == {"de-h", "nde-v"}
    # ISO 10816-3:2009 Table A.1/A.2, group 2 flexible, from memory.
    assert d["points"][0]["zone_limits_mm_s"] == [2.3, 4.5, 7.1]
    assert len(d["margins"]) == 2 * 3
    assert len(d["latest_spectra"]) == 2
    _err(client.get("/api/v1/machines/nope"), 404)


def test_trends_decimated(client, auth):
    auth.login("vic")
    r = client.get("/api/v1/machines/fan-000/trends?from=0&max_points=10&point=de-h").get_json()
    (p,) = r["points"]
    assert p["readings_in_range"] == 60 and p["returned"] <= 10
    assert p["ts"] == sorted(p["ts"]) and set(p["orders"]) == {"1x", "2x"}
    _err(client.get("/api/v1/machines/fan-000/trends?max_points=1"), 400)
    _err(client.get("/api/v1/machines/fan-000/trends?point=zz"), 404)


def test_alarm_pagination_and_filters(client, auth):
    auth.login("vic")
    seen, cursor = [], None
    while True:
        url = "/api/v1/alarms?limit=3" + (f"&cursor={cursor}" if cursor else "")
        body = client.get(url).get_json()
        seen += [a["id"] for a in body["items"]]
        cursor = body["next"]
        if cursor is None:
            break
    assert len(seen) == len(set(seen)) == 8
    act = client.get("/api/v1/alarms?state=active").get_json()["items"]
    assert len(act) == 4 and all(a["state"] == "active" for a in act)
    for key in ("id", "machine", "point", "kind", "severity", "state", "raised_at", "cleared_at", "acknowledged_by", "evidence"):
        assert key in act[0]
    _err(client.get("/api/v1/alarms?state=bogus"), 400)
    one = client.get(f"/api/v1/alarms/{act[0]['id']}").get_json()
    sid = one["transitions"][0]["spectrum_id"]
    sp = client.get(f"/api/v1/spectra/{sid}").get_json()
    assert len(sp["freq_hz"]) == len(sp["amplitude"]) == 2049


def test_viewer_cannot_write_and_csrf(client, auth, app):
    tok = auth.login("vic")
    _err(client.post("/api/v1/alarms/1/acknowledge", json={}, headers={"X-CSRFToken": tok}), 403)
    client.post("/logout", data={"csrf_token": tok})
    tok = auth.login("eng")
    # Session write without the CSRF header is refused.
    _err(client.post("/api/v1/machines/fan-002/modes", json={"name": "x", "frequency_hz": 30}), 400)
    r = client.post("/api/v1/machines/fan-002/modes", json={"name": "shaft bending", "frequency_hz": 42.0, "amplification_factor": 5},
                    headers={"X-CSRFToken": tok})
    assert r.status_code == 201, r.get_data(as_text=True)
    mid = r.get_json()["id"]
    r = client.put(f"/api/v1/machines/fan-002/modes/{mid}", json={"frequency_hz": 44.0}, headers={"X-CSRFToken": tok})
    assert r.get_json()["frequency_hz"] == 44.0 and r.get_json()["amplification_factor"] == 5
    hist = client.get("/api/v1/machines/fan-002/modes").get_json()["history"]
    assert [h["change"] for h in hist[:2]] == ["updated", "created"] and hist[0]["changed_by"] == "eng"
    _err(client.post("/api/v1/machines/fan-002/modes", json={"name": "bad", "frequency_hz": -1}, headers={"X-CSRFToken": tok}), 400)
    _err(client.post("/api/v1/machines/fan-002/modes", json={"name": "shaft bending", "frequency_hz": 1}, headers={"X-CSRFToken": tok}), 409)
    # HTML form without the CSRF field is refused too.
    assert client.post("/alarms/1/acknowledge", data={"comment": "x"}).status_code == 400


def test_acknowledge_and_tokens(client, auth, app):
    tok = auth.login("ada")
    html = client.post("/tokens", data={"user_id": "2", "label": "cmms", "csrf_token": tok}).get_data(as_text=True)
    token = re.search(r'id="new-token-value">([^<]+)<', html).group(1)
    c2 = app.test_client()
    h = {"Authorization": f"Bearer {token}"}
    act = c2.get("/api/v1/alarms?state=active&machine=fan-003", headers=h).get_json()["items"][0]
    r = c2.post(f"/api/v1/alarms/{act['id']}/acknowledge", json={"comment": "seen on site"}, headers=h)
    assert r.status_code == 200 and r.get_json()["acknowledged_by"] == "eng"
    _err(c2.post(f"/api/v1/alarms/{act['id']}/acknowledge", json={}, headers=h), 409)
    # Revoked tokens stop working; the page never shows the token again.
    page = client.get("/tokens").get_data(as_text=True)
    assert token not in page
    tid = re.search(r'/tokens/(\d+)/revoke', page).group(1)
    client.post(f"/tokens/{tid}/revoke", data={"csrf_token": tok})
    _err(c2.get("/api/v1/machines", headers=h), 401)


def test_csv_export(client, auth):
    auth.login("vic")
    r = client.get("/alarms/export.csv?machine=fan-001")
    lines = r.get_data(as_text=True).strip().splitlines()
    assert lines[0].startswith("id,machine,point,kind") and len(lines) == 3


def test_escaping_and_headers(client, auth):
    auth.login("vic")
    r = client.get("/machines/fan-001")
    html = r.get_data(as_text=True)
    assert "<script>alert(1)</script>" not in html and "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    csp = r.headers["Content-Security-Policy"]
    assert "frame-ancestors 'none'" in csp and "unsafe-inline" not in csp
    assert r.headers["X-Content-Type-Options"] == "nosniff"
    assert "<script>" not in re.sub(r'<script src="[^"]+"></script>', "", html)
    assert "qualified people" in html


def test_session_cookie_flags(client, auth):
    tok = auth.csrf()
    r = client.post("/login", data={"username": "vic", "password": PASSWORDS["vic"], "csrf_token": tok})
    cookie = r.headers["Set-Cookie"]
    assert "HttpOnly" in cookie and "SameSite=Lax" in cookie


def test_login_rate_limited(app):
    c = app.test_client()
    a = Auth(c)
    tok = a.csrf()
    codes = [c.post("/login", data={"username": "eng", "password": "wrong", "csrf_token": tok}).status_code for _ in range(6)]
    assert codes[:5] == [401] * 5 and codes[5] == 429
    # Even the right password is refused while limited.
    assert c.post("/login", data={"username": "eng", "password": PASSWORDS["eng"], "csrf_token": tok}).status_code == 429


def test_openapi_matches_routes(app, client):
    doc = json.loads(client.get("/api/v1/openapi.json").get_data())
    documented = {(p, m.upper()) for p, ops in doc["paths"].items() for m in ops}
    actual = set()
    for rule in app.url_map.iter_rules():
        if not rule.rule.startswith("/api/v1"):
            continue
        path = re.sub(r"<(?:[a-z]+:)?([a-z_]+)>", r"{\1}", rule.rule[len("/api/v1"):])
        for m in rule.methods - {"HEAD", "OPTIONS"}:
            actual.add((path, m))
    assert documented == actual


def _count_statements(app, paths, client):
    eng = app.extensions["whirlwatch_engine"]
    n = {"c": 0}

    def cb(*a, **k):
        n["c"] += 1

    out = []
    for p in paths:
        event.listen(eng, "before_cursor_execute", cb)
        n["c"] = 0
        assert client.get(p).status_code == 200
        event.remove(eng, "before_cursor_execute", cb)
        out.append(n["c"])
    return out


def test_statement_count_does_not_grow(tmp_path):
    counts = []
    for n in (10, 500):
        url = f"sqlite:///{tmp_path}/n{n}.sqlite"
        seed(url, machines=n, readings_per_point=20 if n == 10 else 4)
        app = create_app({"DATABASE_URL": url, "SECRET_KEY": "t"})
        c = app.test_client()
        Auth(c).login("vic")
        counts.append(_count_statements(app, ["/", "/api/v1/machines", "/machines/fan-001", "/api/v1/machines/fan-001",
                                              "/api/v1/machines/fan-001/trends?from=0"], c))
    assert counts[0] == counts[1], counts
