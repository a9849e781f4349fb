"""Restarting a baseline after maintenance: the REST API, the machine page, the command
line, and the running service applying the request to its detectors.

Real SQLite files and PostgreSQL (tests/fixtures_db.py), the dashboard through Flask's test
client, the service's batch path without a broker (``handle_batch``).
"""

from __future__ import annotations

import re

import pytest
from click.testing import CliRunner
from registry_api import Api, newest_evaluation, run_bounded, settings_for, waveforms
from sqlalchemy import select

from monitor.cli import main as cli
from monitor.service.service import Service
from monitor.store import Store
from monitor.store.models import BaselineRestart, DetectorState


def restarts(url: str) -> list[BaselineRestart]:
    store = Store.open(url)
    try:
        with store.session() as s:
            return list(s.scalars(select(BaselineRestart).order_by(BaselineRestart.id)))
    finally:
        store.close()


def test_api_records_the_request(api: Api, plant_url: str) -> None:
    r = api.call("POST", "/machines/rwp-1/baseline", {"point": "de-h", "comment": "bearings replaced"})
    assert r.status_code == 202, r.get_data(as_text=True)
    body = r.get_json()
    assert body["machine"] == "rwp-1" and body["point"] == "de-h" and body["comment"] == "bearings replaced"
    assert body["requested_by"] == "eng" and body["applied_at"] is None and body["requested_at"].endswith("Z")
    r = api.call("POST", "/machines/rwp-1/baseline", {"point": None, "comment": "realigned"})
    assert r.status_code == 202 and r.get_json()["point"] is None
    (a, b) = restarts(plant_url)
    assert (a.machine_id, a.point_id, a.requested_by, a.comment) == ("rwp-1", "de-h", "eng", "bearings replaced")
    assert (b.point_id, b.applied_at) == (None, None)
    d = api.call("GET", "/machines/rwp-1").get_json()
    assert [x["comment"] for x in d["baseline_restarts"]] == ["realigned", "bearings replaced"]


@pytest.mark.parametrize("path, body, status", [
    ("/machines/rwp-1/baseline", {"point": "de-h"}, 400),
    ("/machines/rwp-1/baseline", {"point": "de-h", "comment": "   "}, 400),
    ("/machines/rwp-1/baseline", {"point": 3, "comment": "x"}, 400),
    ("/machines/rwp-1/baseline", {"comment": "x", "feature": "1x"}, 400),
    ("/machines/rwp-1/baseline", None, 400),
    ("/machines/nope/baseline", {"point": None, "comment": "x"}, 404),
    ("/machines/rwp-1/baseline", {"point": "zz", "comment": "x"}, 404),
])
def test_api_refusals(api: Api, plant_url: str, path: str, body, status: int) -> None:
    r = api.call("POST", path, body)
    assert r.status_code == status, r.get_data(as_text=True)
    err = r.get_json()["error"]
    assert err["status"] == status and err["message"]
    assert restarts(plant_url) == []


def test_viewer_may_not_restart(api: Api, plant_url: str) -> None:
    r = api.call("POST", "/machines/rwp-1/baseline", {"point": None, "comment": "x"}, viewer=True)
    assert r.status_code == 403
    assert restarts(plant_url) == []


def test_machine_page_offers_the_restart_to_engineers(api: Api) -> None:
    c = api.app.test_client()
    html = c.get("/login").get_data(as_text=True)
    tok = re.search(r'name="csrf-token" content="([^"]+)"', html).group(1)
    r = c.post("/login", data={"username": "eng", "password": "engineer-pass-1", "csrf_token": tok})
    assert r.status_code == 302
    page = c.get("/machines/rwp-1").get_data(as_text=True)
    form = page[page.index('id="baseline-form"'):]
    form = form[:form.index("</form>")]
    assert 'name="comment"' in form and "required" in form and 'name="point"' in form
    # A session write without the CSRF header is refused; with it, it is recorded.
    assert c.post("/api/v1/machines/rwp-1/baseline", json={"point": None, "comment": "x"}).status_code == 400
    tok = re.search(r'name="csrf-token" content="([^"]+)"', page).group(1)
    r = c.post("/api/v1/machines/rwp-1/baseline", json={"point": None, "comment": "x"},
               headers={"X-CSRFToken": tok})
    assert r.status_code == 202


def test_command_line_records_the_request(plant_url: str) -> None:
    res = CliRunner().invoke(cli, ["baseline", "restart", "rwp-1", "--point", "de-h", "--comment",
                                   "coupling replaced", "--user", "ana", "--database", plant_url])
    assert res.exit_code == 0, res.output
    (r,) = restarts(plant_url)
    assert (r.machine_id, r.point_id, r.comment, r.requested_by) == ("rwp-1", "de-h", "coupling replaced", "ana")
    for args in (["nope", "--comment", "x"], ["rwp-1", "--point", "zz", "--comment", "x"],
                 ["rwp-1", "--comment", " "]):
        res = CliRunner().invoke(cli, ["baseline", "restart", *args, "--database", plant_url])
        assert res.exit_code != 0 and res.output.strip()
    assert len(restarts(plant_url)) == 1


def _statuses(evaluation: dict) -> dict[str, str]:
    return {f["name"]: f["baseline_status"] for f in evaluation["features"]}


def test_running_service_applies_the_restart(api: Api, plant_url: str) -> None:
    svc = Service(settings_for(plant_url), stale_check_s=0)
    try:
        # 21 readings: more than the baseline window (20 readings, docs/alarms.md).
        run_bounded(svc, waveforms("rwp-1", 0, 21))
        learned = _statuses(newest_evaluation(plant_url, "rwp-1"))
        assert not learned["overall"].startswith("learning"), learned
        r = api.call("POST", "/machines/rwp-1/baseline", {"point": "de-h", "comment": "bearings replaced"})
        assert r.status_code == 202
        run_bounded(svc, waveforms("rwp-1", 21, 1))
        after = _statuses(newest_evaluation(plant_url, "rwp-1"))
        assert after and all(s.startswith("learning") for s in after.values()), after
        (req,) = restarts(plant_url)
        assert req.applied_at is not None
        # The next batch does not restart it again.
        run_bounded(svc, waveforms("rwp-1", 22, 1))
        assert _statuses(newest_evaluation(plant_url, "rwp-1"))["overall"] == "learning 2/20"
    finally:
        svc.store.close()


def test_idle_machine_restarted_by_the_periodic_pass(api: Api, plant_url: str) -> None:
    svc = Service(settings_for(plant_url), stale_check_s=0)
    try:
        run_bounded(svc, waveforms("ab-1", 0, 21))
        r = api.call("POST", "/machines/ab-1/baseline", {"point": None, "comment": "overhaul"})
        assert r.status_code == 202
        svc.apply_registry_requests()  # what the periodic loop runs
        (req,) = restarts(plant_url)
        assert req.applied_at is not None
        store = Store.open(plant_url)
        try:
            with store.session() as s:
                state = s.scalar(select(DetectorState.state).where(DetectorState.machine_id == "ab-1"))
        finally:
            store.close()
        assert all(len(b["values"]) == 0 for _, _, b in state["evaluator"]["baselines"])
    finally:
        svc.store.close()
