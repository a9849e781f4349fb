"""The overview at plant scale (docs/api.md, "Machines"): ``GET /api/v1/machines`` filters,
sorts and pages in the database from the retained status the service stores
(``machine_status``), on a real temporary SQLite file and on PostgreSQL.

- SQL statements per page, counted with a SQLAlchemy event listener on the dashboard's
  real engine, are the same at two plant sizes (the page is read from indexes; nothing is
  worked out per machine).
- The pages, filters and sorts agree with the whole list (paging is a partition of it).
- The stored status is the one the service built: the published shape
  (docs/schemas/status.json), the alarms the alarm list shows open, and a restarted
  service carries on from it.
- Every active machine has one status row: a machine the registry adds shows as no data,
  one it retires leaves the counts.

Plants: tests/dashboard_seed.py (three machines through the service's batch path, the
others bulk copies of their registry rows and stored statuses).
"""

from __future__ import annotations

import re

import pytest
from contracts import check_status
from dashboard_seed import PASSWORDS, T_END, plant, seed, seed_large
from fixtures_db import fresh_database
from service_helpers import message, offline_service
from sqlalchemy import event, select

from dashboard import create_app
from monitor.model.readings import SpeedReading
from monitor.model.registry import Registry
from monitor.store import Store, import_registry
from monitor.store.models import Alarm, MachineStatus

BACKENDS = ["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)]
#: Overview requests whose statements are counted: the page as it opens, by name, a
#: filtered and sorted page further on, and the page itself.
PATHS = ["/api/v1/machines", "/api/v1/machines?sort=-name&limit=20&cursor=5",
         "/api/v1/machines?q=FAN&state=alarm&sort=margin&limit=5", "/api/v1/machines?severity=alert&zone=B",
         "/"]


def _client(url: str):
    app = create_app({"DATABASE_URL": url, "SECRET_KEY": "t", "TESTING": True})
    c = app.test_client()
    tok = re.search(r'name="csrf-token" content="([^"]+)"', c.get("/login").get_data(as_text=True)).group(1)
    assert c.post("/login", data={"username": "vic", "password": PASSWORDS["vic"], "csrf_token": tok}).status_code == 302
    return app, c


def _statements(app, client, path: str) -> int:
    eng = app.extensions["whirlwatch_engine"]
    n = {"c": 0}

    def count(*a, **k):
        n["c"] += 1

    event.listen(eng, "before_cursor_execute", count)
    try:
        assert client.get(path).status_code == 200, path
    finally:
        event.remove(eng, "before_cursor_execute", count)
    return n["c"]


@pytest.mark.parametrize("backend", BACKENDS)
def test_statements_per_page_do_not_grow_with_the_plant(tmp_path, backend):
    counts = {}
    for machines in (12, 600):
        with fresh_database(backend, tmp_path) as url:
            seed_large(url, machines)
            app, c = _client(url)
            try:
                assert c.get("/api/v1/machines").get_json()["total"] == machines
                counts[machines] = [_statements(app, c, p) for p in PATHS]
            finally:
                app.extensions["whirlwatch_engine"].dispose()
    assert counts[12] == counts[600], counts


@pytest.fixture(scope="module", params=BACKENDS)
def plant_url(request, tmp_path_factory):
    with fresh_database(request.param, tmp_path_factory.mktemp("overview")) as url:
        seed_large(url, 37)
        yield url


@pytest.fixture()
def client(plant_url):
    app, c = _client(plant_url)
    yield c
    app.extensions["whirlwatch_engine"].dispose()


def _all(client, query: str = "") -> list[dict]:
    body = client.get(f"/api/v1/machines?limit=500{query}").get_json()
    assert body["next"] is None and body["total"] == len(body["items"])
    return body["items"]


def test_pages_partition_the_sorted_list(client):
    # Paging is a partition of the sorted list: each machine once, in order (common practice).
    for sort in ("state", "-state", "name", "-name", "margin", "-speed", "zone", "-alarms", "last_reading"):
        whole = [m["id"] for m in _all(client, f"&sort={sort}")]
        paged, cursor, pages = [], "", 0
        while cursor is not None and pages < 20:
            body = client.get(f"/api/v1/machines?sort={sort}&limit=8&cursor={cursor}").get_json()
            paged += [m["id"] for m in body["items"]]
            cursor, pages = body["next"], pages + 1
        assert paged == whole and len(whole) == 37, sort


def test_sorts_and_filters_agree_with_the_whole_list(client):
    every = _all(client)
    body = client.get("/api/v1/machines?limit=1").get_json()
    assert body["counts"] == {s: sum(m["state"] == s for m in every) for s in ("alarm", "normal", "no_data")}
    assert body["total"] == 37 and body["counts"]["alarm"] > 0 and body["counts"]["normal"] > 0
    # Worst first: severe, alert, advisory, normal, no data; then machine id (docs/api.md).
    rank = {"severe": 0, "alert": 1, "advisory": 2}
    keys = [(rank[m["worst_severity"]] if m["state"] == "alarm" else 3 if m["state"] == "normal" else 4, m["id"])
            for m in every]
    assert keys == sorted(keys)
    by_name = _all(client, "&sort=name")
    assert [(m["name"], m["id"]) for m in by_name] == sorted((m["name"], m["id"]) for m in every)
    by_margin = [m["nearest_margin"] for m in _all(client, "&sort=margin")]
    gaps = [nm["margin_pct"] - nm["required_pct"] for nm in by_margin if nm is not None]
    assert gaps == sorted(gaps) and all(nm is None for nm in by_margin[len(gaps):])
    for query, keep in [
        ("&state=alarm", lambda m: m["state"] == "alarm"),
        ("&state=normal", lambda m: m["state"] == "normal"),
        ("&severity=advisory", lambda m: m["worst_severity"] == "advisory"),
        ("&group=Hall%202", lambda m: m["location"] == "Hall 2"),
        ("&zone=B", lambda m: (m["worst_zone"] or {}).get("zone") == "B"),
        ("&q=FAN%2010", lambda m: "fan 10" in m["name"].lower()),
        ("&q=fan-0001", lambda m: "fan-0001" in m["id"]),
        ("&q=50%25", lambda m: False),  # '%' is a character, not a wildcard
    ]:
        assert [m["id"] for m in _all(client, query)] == [m["id"] for m in every if keep(m)], query
    for bad in ("limit=0", "limit=501", "sort=speedy", "state=broken", "cursor=-1", "q=a%00b", "zone=E"):
        r = client.get(f"/api/v1/machines?{bad}")
        assert r.status_code == 400 and set(r.get_json()) == {"error"}, bad


def test_the_stored_status_is_the_one_the_service_built(tmp_path):
    url = f"sqlite:///{tmp_path / 'store.sqlite'}"
    seed(url, machines=3, readings_per_point=20)
    store = Store.open(url)
    try:
        with store.session() as s:
            bodies = {r.machine_id: r for r in s.scalars(select(MachineStatus))}
            open_alarms = {m: sum(1 for a in s.scalars(select(Alarm).where(
                Alarm.machine_id == m, Alarm.state.in_(("active", "acknowledged"))))) for m in bodies}
    finally:
        store.close()
    assert set(bodies) == {"fan-000", "fan-001", "fan-002"}
    for m, row in bodies.items():
        check_status(row.status)  # the shape published on the status topic (docs/mqtt.md)
        assert row.active_alarms == len(row.status["active_alarms"]) == open_alarms[m]
        assert set(row.status["zones"]) == {"de-h", "nde-v"}
    # A restarted service carries on from the stored status: after one more speed reading
    # both points' zones and levels are still in it.
    before = bodies["fan-000"].status
    svc = offline_service(url, clock=lambda: T_END.timestamp() + 120.0)
    try:
        (out,) = svc.handle_batch([message(SpeedReading("fan-000", T_END.timestamp() + 60.0, 14.2))])
    finally:
        svc.store.close()
    assert out.status["zones"] == before["zones"] and out.status["worst_zone"] == before["worst_zone"]
    assert out.status["speed_hz"] == 14.2 and out.status["speed_source"] == "speed_topic"
    store = Store.open(url)
    try:
        with store.session() as s:
            assert s.get(MachineStatus, "fan-000").status == out.status
    finally:
        store.close()


def test_the_registry_keeps_one_status_row_per_active_machine(plant_url, client):
    store = Store.open(plant_url)
    try:
        with store.transaction() as s:
            import_registry(s, Registry(machines=plant(40).machines[38:40]))  # two machines new to the plant
    finally:
        store.close()
    new = _all(client, "&state=no_data")
    assert [m["id"] for m in new] == ["fan-038", "fan-039"]
    assert new[0]["last_reading_at"] is None and new[0]["active_alarms"] == 0
    assert client.get("/api/v1/machines?sort=state&limit=2&cursor=37").get_json()["items"] == new
    store = Store.open(plant_url)
    try:
        with store.transaction() as s:
            # Retire everything but the three machines seeded through the service.
            import_registry(s, plant(3), replace=True)
    finally:
        store.close()
    body = client.get("/api/v1/machines").get_json()
    assert body["total"] == 3 and sum(body["counts"].values()) == 3
    assert {m["id"] for m in body["items"]} == {"fan-000", "fan-001", "fan-002"}
