"""Dashboard and JSON API through the Flask test client, on a real temporary SQLite file
and on PostgreSQL (a fresh schema in database ``test`` at 127.0.0.1:5432), seeded through
the service's batch path (tests/dashboard_seed.py): the readings, evaluations and alarms
are the ones the service writes."""

from __future__ import annotations

import datetime as dt
import json
import re

import pytest
from dashboard_seed import PASSWORDS, seed
from fixtures_db import fresh_database
from sqlalchemy import event, select

from dashboard import create_app
from monitor.store import Store
from monitor.store.models import Measurement

BACKENDS = ["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)]


@pytest.fixture(scope="module", params=BACKENDS)
def db_url(request, tmp_path_factory):
    with fresh_database(request.param, tmp_path_factory.mktemp("dash")) as url:
        seed(url, machines=4, readings_per_point=60, names={1: "<script>alert(1)</script>"})
        yield url


@pytest.fixture()
def app(db_url):
    a = create_app({"DATABASE_URL": db_url, "SECRET_KEY": "test", "TESTING": True})
    yield a
    a.extensions["whirlwatch_engine"].dispose()


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
    m = next(x for x in items if x["id"] == "fan-000")
    # The overview counts the alarms the alarm list shows open (active or acknowledged).
    opened = client.get("/api/v1/alarms?state=open&machine=fan-000&limit=500").get_json()["items"]
    assert opened and m["state"] == "alarm" and m["active_alarms"] == len(opened)
    # fan-003 holds copies of readings and no alarms.
    quiet = next(x for x in items if x["id"] == "fan-003")
    assert quiet["state"] == "normal" and quiet["active_alarms"] == 0 and quiet["worst_severity"] is None
    # Separation margin = |f_exc - f_mode| / f_mode, % of the mode frequency (API Standard
    # 684 convention; docs/alarms.md).
    nm = m["nearest_margin"]
    assert nm["margin_pct"] == pytest.approx(abs(nm["excitation_hz"] - nm["mode_hz"]) / nm["mode_hz"] * 100)
    # The overview's nearest margin is the machine page's row closest to its required margin.
    d = client.get("/api/v1/machines/fan-000").get_json()
    near = min(d["margins"], key=lambda r: r["margin_pct"] - r["required_pct"])
    assert (nm["mode"], nm["excitation"]) == (near["mode"], near["excitation"])
    assert nm["margin_pct"] == pytest.approx(near["margin_pct"])
    assert {p["id"] for p in d["points"]} == {"de-h", "nde-v"}
    # ISO 10816-3:2009 Table A.1/A.2, group 2 flexible, from memory.
    assert d["points"][0]["zone_limits_mm_s"] == [2.3, 4.5, 7.1]
    assert len(d["margins"]) == 2 * 3
    for r in d["margins"]:
        # Separation margin, % of the mode frequency (API Standard 684; docs/alarms.md).
        assert r["margin_pct"] == pytest.approx(abs(r["excitation_hz"] - r["mode_hz"]) / r["mode_hz"] * 100)
        assert r["excitation_hz"] == pytest.approx(r["order"] * d["speed_hz"])
        # SDOF dynamic amplification 1/sqrt((1-r^2)^2 + (2 zeta r)^2) (any vibration
        # textbook, e.g. Rao, Mechanical Vibrations, eq. 3.30); zeta = 0.04 for this mode.
        if r["mode"] == "pedestal rocking":
            fr = r["excitation_hz"] / r["mode_hz"]
            assert r["amplification"] == pytest.approx(1 / ((1 - fr**2) ** 2 + (2 * 0.04 * fr) ** 2) ** 0.5, rel=1e-6)
    # The learned baseline and the growth features the detector stored with the reading.
    de = d["points"][0]
    feats = {f["name"]: f for f in de["features"]}
    assert {"overall", "1x", "2x", "7x"} <= set(feats)
    assert de["baseline_mm_s_rms"] == feats["overall"]["baseline_median"] is not None
    assert feats["overall"]["ratio"] == pytest.approx(feats["overall"]["value"] / feats["overall"]["baseline_median"])
    assert len(d["latest_spectra"]) == 2
    _err(client.get("/api/v1/machines/nope"), 404)


def test_trends_decimated(client, auth):
    auth.login("vic")
    r = client.get("/api/v1/machines/fan-000/trends?from=0&max_points=10&point=de-h").get_json()
    (p,) = r["points"]
    # 60: readings_per_point the fixture seeded above (a count, not a measured value)
    assert p["readings_in_range"] == 60 and p["returned"] <= 10
    # 1x, 2x and each configured excitation order (the plant's fans have orders 1, 2, 7).
    assert p["ts"] == sorted(p["ts"]) and list(p["orders"]) == ["1x", "2x", "7x"]
    assert all(len(v) == p["returned"] for v in p["orders"].values())
    assert p["zone_limits_mm_s"] == [2.3, 4.5, 7.1]  # ISO 10816-3:2009 Table A.1, group 2 flexible, from memory
    assert {"overall", "1x", "2x", "7x"} <= set(p["baseline"])
    # The last kept reading is the newest: its baseline is the one the machine page shows.
    d = client.get("/api/v1/machines/fan-000").get_json()
    assert p["baseline"]["overall"][-1] == d["points"][0]["baseline_mm_s_rms"]
    # Decimation keeps the largest overall level of the range (the excursion survives).
    full = client.get("/api/v1/machines/fan-000/trends?from=0&max_points=100&point=de-h").get_json()["points"][0]
    assert max(full["overall_mm_s_rms"]) == max(p["overall_mm_s_rms"])
    _err(client.get("/api/v1/machines/fan-000/trends?max_points=1"), 400)
    _err(client.get("/api/v1/machines/fan-000/trends?point=zz"), 404)


def test_alarm_pagination_and_filters(client, auth, db_url):
    auth.login("vic")
    everything = [a["id"] for a in client.get("/api/v1/alarms?limit=500").get_json()["items"]]
    seen, cursor = [], None
    while True:
        url = "/api/v1/alarms?limit=3" + (f"&cursor={cursor}" if cursor else "")
        body = client.get(url).get_json()
        seen += [a["id"] for a in body["items"]]
        cursor = body["next"]
        if cursor is None:
            break
    # Pages of three give every alarm once, in the order of one page holding them all.
    assert len(seen) > 3 and seen == everything and len(set(seen)) == len(seen)
    act = client.get("/api/v1/alarms?state=active&limit=500").get_json()["items"]
    assert act and all(a["state"] == "active" for a in act)
    full = client.get("/api/v1/alarms?limit=500").get_json()["items"]
    assert {a["id"] for a in act} == {a["id"] for a in full if a["state"] == "active"}
    for key in ("id", "machine", "point", "kind", "severity", "state", "raised_at", "cleared_at", "acknowledged_by", "evidence"):
        assert key in act[0]
    _err(client.get("/api/v1/alarms?state=bogus"), 400)
    one = client.get(f"/api/v1/alarms/{act[0]['id']}").get_json()
    sid = one["transitions"][0]["spectrum_id"]
    sp = client.get(f"/api/v1/spectra/{sid}").get_json()
    assert len(sp["freq_hz"]) == len(sp["amplitude"]) == 2049
    # the running speed of the spectrum's reading, as stored with the reading
    store = Store.open(db_url)
    try:
        with store.session() as s:
            stored = s.execute(select(Measurement.speed_hz).where(
                Measurement.machine_id == sp["machine"], Measurement.point_id == sp["point"],
                Measurement.ts == dt.datetime.fromisoformat(sp["ts"].replace("Z", "+00:00")))).scalar_one()
    finally:
        store.close()
    assert stored is not None and sp["speed_hz"] == stored


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
    # The stored margins no longer fit the mode set: the table is recomputed with the new mode.
    rows = client.get("/api/v1/machines/fan-002").get_json()["margins"]
    assert len(rows) == 3 * 3 and {r["mode_hz"] for r in rows if r["mode"] == "shaft bending"} == {44.0}
    hist = client.get("/api/v1/machines/fan-002/modes").get_json()["history"]
    assert [h["change"] for h in hist[:2]] == ["updated", "created"] and hist[0]["changed_by"] == "eng"
    _err(client.post("/api/v1/machines/fan-002/modes", json={"name": "bad", "frequency_hz": -1}, headers={"X-CSRFToken": tok}), 400)
    _err(client.post("/api/v1/machines/fan-002/modes", json={"name": "shaft bending", "frequency_hz": 1}, headers={"X-CSRFToken": tok}), 409)
    # HTML form without the CSRF field is refused too.
    assert client.post("/alarms/1/acknowledge", data={"comment": "x"}).status_code == 400


def test_acknowledge_needs_a_comment(client, auth):
    # docs/alarms.md: "Acknowledgement needs a user name and a comment".
    tok = auth.login("eng")
    act = client.get("/api/v1/alarms?state=active&machine=fan-002").get_json()["items"][0]
    for blank in ("", "   ", "\t\n", "\u3000"):
        # The page form: back to the list with one sentence on top, nothing stored.
        r = client.post(f"/alarms/{act['id']}/acknowledge",
                        data={"comment": blank, "csrf_token": tok, "back": "/alarms/?machine=fan-002"})
        assert r.status_code == 302 and r.headers["Location"].endswith("/alarms/?machine=fan-002")
        page = client.get(r.headers["Location"]).get_data(as_text=True)
        assert "Field &#39;comment&#39; is required" in page or "Field 'comment' is required" in page
        # The API: 400 naming the field, nothing stored.
        for body in ({"comment": blank}, {}):
            r = client.post(f"/api/v1/alarms/{act['id']}/acknowledge", json=body, headers={"X-CSRFToken": tok})
            _err(r, 400)
            assert "'comment'" in r.get_json()["error"]["message"]
    after = client.get(f"/api/v1/alarms/{act['id']}").get_json()
    assert after["state"] == "active" and after["acknowledged_by"] is None
    assert [t["transition"] for t in after["transitions"]].count("acknowledged") == 0


def test_acknowledge_and_tokens(client, auth, app):
    tok = auth.login("ada")
    html = client.post("/tokens", data={"user_id": "2", "label": "cmms", "csrf_token": tok}).get_data(as_text=True)
    token = re.search(r'id="new-token-value">([^<]+)<', html).group(1)
    c2 = app.test_client()
    h = {"Authorization": f"Bearer {token}"}
    act = c2.get("/api/v1/alarms?state=active&machine=fan-001", headers=h).get_json()["items"][0]
    r = c2.post(f"/api/v1/alarms/{act['id']}/acknowledge", json={"comment": "seen on site"}, headers=h)
    assert r.status_code == 200 and r.get_json()["acknowledged_by"] == "eng"
    _err(c2.post(f"/api/v1/alarms/{act['id']}/acknowledge", json={"comment": "again"}, headers=h), 409)
    # Revoked tokens stop working; the page never shows the token again.
    page = client.get("/tokens").get_data(as_text=True)
    assert token not in page
    tid = re.search(r'/tokens/(\d+)/revoke', page).group(1)
    client.post(f"/tokens/{tid}/revoke", data={"csrf_token": tok})
    _err(c2.get("/api/v1/machines", headers=h), 401)


def test_csv_export(client, auth):
    auth.login("vic")
    listed = client.get("/api/v1/alarms?machine=fan-001&limit=500").get_json()["items"]
    r = client.get("/alarms/export.csv?machine=fan-001")
    lines = r.get_data(as_text=True).strip().splitlines()
    # A header, then one line per alarm (no evidence here spans lines: JSON on one line).
    assert lines[0].startswith("id,machine,point,kind") and len(lines) == 1 + len(listed) > 1
    assert [int(line.split(",")[0]) for line in lines[1:]] == [a["id"] for a in listed]


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


@pytest.mark.parametrize("backend", BACKENDS)
def test_statement_count_does_not_grow(tmp_path, backend):
    counts = []
    for n in (10, 500):
        with fresh_database(backend, tmp_path) as url:
            seed(url, machines=n, readings_per_point=20 if n == 10 else 4, detected=1)
            app = create_app({"DATABASE_URL": url, "SECRET_KEY": "t"})
            c = app.test_client()
            Auth(c).login("vic")
            counts.append(_count_statements(app, ["/", "/api/v1/machines", "/machines/fan-001", "/api/v1/machines/fan-001",
                                                  "/api/v1/machines/fan-001/trends?from=0"], c))
            app.extensions["whirlwatch_engine"].dispose()
    assert counts[0] == counts[1], counts
