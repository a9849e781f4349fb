"""Engineers' registry edits: kept across service starts, live in the running detectors,
and bad values kept out at every door (REST API, registry file, command line) while an
old database already holding one still works.

Real SQLite files and PostgreSQL (tests/fixtures_db.py), the dashboard through Flask's test
client with an API token, the service's batch path without a broker (``handle_batch``).
"""

from __future__ import annotations

from pathlib import Path

import pytest
from click.testing import CliRunner
from registry_api import Api, newest_evaluation, run_bounded, settings_for, waveforms
from service_helpers import PLANT, stored_evaluator_state
from sqlalchemy import select, update

from monitor.cli import main as cli
from monitor.config import load_settings
from monitor.model.registry_file import load_registry
from monitor.service.service import Service
from monitor.store import Store
from monitor.store.models import Mode, ModeHistory


def stored_baselines(url: str, machine: str) -> dict[tuple[str, str], int]:
    """How many readings each (point, feature) baseline of ``machine`` holds, as stored."""
    return {(p, f): len(b["values"]) for p, f, b in stored_evaluator_state(url, machine)["baselines"]}


# ----------------------------------------------------------------------------- edits kept


def test_service_start_keeps_modes_added_through_the_api(plant_url: str, api: Api) -> None:
    r = api.call("POST", "/machines/rwp-1/modes", {"name": "motor frame", "frequency_hz": 61.0,
                                                   "damping_ratio": 0.05, "source": "impact test"})
    assert r.status_code == 201, r.get_data(as_text=True)
    # A start with the machines file set, as deploy/whirlwatch.toml has it.
    svc = Service(settings_for(plant_url, PLANT), stale_check_s=0)
    try:
        assert [m.name for m in svc.registry.machine("rwp-1").modes] == ["plinth rocking", "motor frame"]
    finally:
        svc.store.close()
    store = Store.open(plant_url)
    try:
        with store.session() as s:
            names = s.scalars(select(Mode.name).where(Mode.machine_id == "rwp-1").order_by(Mode.position)).all()
            changes = s.scalars(select(ModeHistory.change).where(
                ModeHistory.machine_id == "rwp-1", ModeHistory.mode_name == "motor frame")).all()
    finally:
        store.close()
    assert names == ["plinth rocking", "motor frame"]
    assert changes == ["created"]


def test_service_start_keeps_api_edits_of_modes_the_file_names(plant_url: str, api: Api,
                                                               tmp_path: Path) -> None:
    mid = api.call("GET", "/machines/rwp-1/modes").get_json()["items"][0]["id"]
    r = api.call("PUT", f"/machines/rwp-1/modes/{mid}", {"frequency_hz": 36.5})
    assert r.status_code == 200, r.get_data(as_text=True)
    svc = Service(settings_for(plant_url, PLANT), stale_check_s=0)
    try:
        # The file has not changed since it was imported: the engineer's value stands.
        assert svc.registry.machine("rwp-1").modes[0].frequency_hz == 36.5
    finally:
        svc.store.close()
    # An entry changed in the file is applied at the next start: what the file names, it updates.
    edited = tmp_path / "plant.toml"
    edited.write_text(PLANT.read_text().replace("frequency_hz = 38\n", "frequency_hz = 39\n"))
    assert edited.read_text() != PLANT.read_text()
    svc = Service(settings_for(plant_url, edited), stale_check_s=0)
    try:
        assert svc.registry.machine("rwp-1").modes[0].frequency_hz == 39.0
        assert svc.registry.machine("ef-2") == load_registry(PLANT).machine("ef-2")
    finally:
        svc.store.close()


def test_mode_edit_reaches_the_running_detectors_within_one_batch(plant_url: str, api: Api) -> None:
    svc = Service(settings_for(plant_url), stale_check_s=0)
    try:
        run_bounded(svc, waveforms("rwp-1", 0, 6))
        before = newest_evaluation(plant_url, "rwp-1")
        assert {r["mode_hz"] for r in before["margins"]} == {38.0}
        learned = stored_baselines(plant_url, "rwp-1")
        mid = api.call("GET", "/machines/rwp-1/modes").get_json()["items"][0]["id"]
        # Moved well clear of 1x, 2x and 5x (about 25, 49 and 124 Hz), so the readings
        # still feed the baselines.
        r = api.call("PUT", f"/machines/rwp-1/modes/{mid}", {"frequency_hz": 80.0})
        assert r.status_code == 200, r.get_data(as_text=True)
        run_bounded(svc, waveforms("rwp-1", 6, 2))
        after = newest_evaluation(plant_url, "rwp-1")
        # The next batch is evaluated against the edited mode ...
        assert {r["mode_hz"] for r in after["margins"]} == {80.0}
        # ... by the same detector: its learned state carried over, not started afresh.
        grown = stored_baselines(plant_url, "rwp-1")
        assert set(grown) == set(learned)
        assert all(grown[k] >= n for k, n in learned.items()) and sum(grown.values()) > sum(learned.values())
    finally:
        svc.store.close()


# ----------------------------------------------------------------------------- bad values


@pytest.mark.parametrize("body, key", [
    ({"name": "x", "frequency_hz": 1e-80}, "frequency_hz"),
    ({"name": "x", "frequency_hz": 5e6}, "frequency_hz"),
    ({"name": "x", "frequency_hz": 20.0, "damping_ratio": 0.0}, "damping_ratio"),
    ({"name": "x", "frequency_hz": 20.0, "damping_ratio": 1.0}, "damping_ratio"),
    ({"name": "x", "frequency_hz": 20.0, "amplification_factor": 0.5}, "amplification_factor"),
])
def test_api_refuses_physically_impossible_modes(api: Api, body: dict, key: str) -> None:
    r = api.call("POST", "/machines/ef-2/modes", body)
    assert r.status_code == 400, r.get_data(as_text=True)
    err = r.get_json()["error"]
    assert err["code"] == "bad_request" and f"'{key}'" in err["message"] and "ef-2" in err["message"]


def test_import_refuses_an_absurd_frequency_naming_file_machine_entry_and_key(tmp_path: Path,
                                                                              plant_url: str) -> None:
    bad = tmp_path / "plant.toml"
    bad.write_text(PLANT.read_text().replace("frequency_hz = 15.5", "frequency_hz = 1e-80"))
    res = CliRunner().invoke(cli, ["machines", "import", str(bad), "--database", plant_url])
    assert res.exit_code != 0
    msg = res.output
    assert str(bad) in msg and "'ef-2'" in msg and "'pedestal lateral'" in msg and "'frequency_hz'" in msg


def test_an_old_database_holding_an_absurd_value_keeps_working(plant_url: str, api: Api) -> None:
    svc = Service(settings_for(plant_url), stale_check_s=0)
    try:
        run_bounded(svc, waveforms("ef-2", 30, 4) + waveforms("rwp-1", 0, 2))
    finally:
        svc.store.close()
    store = Store.open(plant_url)
    try:
        with store.transaction() as s:  # as an older version let it in
            s.execute(update(Mode).where(Mode.machine_id == "ef-2").values(frequency_hz=1e-80))
    finally:
        store.close()
    r = api.call("GET", "/machines")
    assert r.status_code == 200, r.get_data(as_text=True)
    assert {m["id"] for m in r.get_json()["items"]} >= {"ef-2", "rwp-1"}
    d = api.call("GET", "/machines/ef-2")
    assert d.status_code == 200, d.get_data(as_text=True)
    (mode,) = d.get_json()["modes"]
    assert mode["valid"] is False and "'frequency_hz'" in mode["problem"]
    # A restarted service skips the mode (a warning) and goes on storing readings.
    svc = Service(settings_for(plant_url), stale_check_s=0)
    try:
        assert svc.registry.machine("ef-2").modes == ()
        outs = run_bounded(svc, waveforms("ef-2", 34, 2) + waveforms("rwp-1", 2, 2))
        assert [o.kind for o in outs] == ["waveform"] * 4
    finally:
        svc.store.close()


# ----------------------------------------------------------------------------- import


def _machines_state(url: str) -> dict[str, tuple[bool, list[str], list[str]]]:
    """Per machine: (active, active point ids, mode names)."""
    from monitor.store.models import Machine as MachineRow

    store = Store.open(url)
    try:
        with store.session() as s:
            return {m.id: (m.active, [p.id for p in m.points if p.active], [x.name for x in m.modes])
                    for m in s.scalars(select(MachineRow))}
    finally:
        store.close()


def _only_ef2_without_modes(tmp_path: Path) -> Path:
    text = PLANT.read_text()
    start = text.index("[[machines]]")
    second = text.index("[[machines]]", start + 1)
    ef2 = text[start:second]
    ef2 = ef2[:ef2.index("  [[machines.modes]]")]
    f = tmp_path / "ef2.toml"
    f.write_text(ef2)
    return f


def test_import_without_replace_keeps_what_the_file_leaves_out(tmp_path: Path, plant_url: str) -> None:
    before = _machines_state(plant_url)
    f = _only_ef2_without_modes(tmp_path)
    res = CliRunner().invoke(cli, ["machines", "import", str(f), "--database", plant_url])
    assert res.exit_code == 0, res.output
    assert _machines_state(plant_url) == before
    # It says what it kept and how to remove it.
    assert "ef-2/pedestal lateral" in res.output and "--replace" in res.output


def test_import_replace_says_what_it_removes(tmp_path: Path, plant_url: str) -> None:
    f = _only_ef2_without_modes(tmp_path)
    res = CliRunner().invoke(cli, ["machines", "import", str(f), "--replace", "--database", plant_url])
    assert res.exit_code == 0, res.output
    after = _machines_state(plant_url)
    assert after["ef-2"] == (True, ["de-h"], [])
    others = sorted(m for m in after if m != "ef-2")
    assert others and all(after[m][0] is False for m in others)
    out = res.output
    assert "ef-2/pedestal lateral" in out and all(m in out for m in others)
    assert "no modes" in out
    # Deleted modes keep their history.
    store = Store.open(plant_url)
    try:
        with store.session() as s:
            assert s.scalars(select(ModeHistory.change).where(ModeHistory.mode_name == "pedestal lateral")
                             .order_by(ModeHistory.id)).all() == ["created", "deleted"]
    finally:
        store.close()


def test_import_dry_run_changes_nothing(tmp_path: Path, plant_url: str) -> None:
    before = _machines_state(plant_url)
    f = _only_ef2_without_modes(tmp_path)
    res = CliRunner().invoke(cli, ["machines", "import", str(f), "--replace", "--dry-run",
                                   "--database", plant_url])
    assert res.exit_code == 0, res.output
    assert "ef-2/pedestal lateral" in res.output
    assert _machines_state(plant_url) == before


def test_recorded_bump_test_reads_past_an_absurd_stored_mode(tmp_path: Path, database_url: str) -> None:
    from test_modes import TestBumptestCommand

    from monitor.model.registry import Machine, Point, Registry
    from monitor.model.registry import Mode as RegMode
    from monitor.model.registry_file import dump_registry
    from monitor.store import upgrade

    stream = TestBumptestCommand()._stream(tmp_path, force=True)
    reg = tmp_path / "m.toml"
    reg.write_text(dump_registry(Registry((Machine(
        id="tb-1", points=(Point("top-h", "horizontal", "acceleration", "m/s^2"),),
        modes=(RegMode("frame", 42.0, damping_ratio=0.02), RegMode("sway", 3.0))),))))
    upgrade(database_url)
    res = CliRunner().invoke(cli, ["machines", "import", str(reg), "--database", database_url])
    assert res.exit_code == 0, res.output
    store = Store.open(database_url)
    try:
        with store.transaction() as s:  # as an older version let it in
            s.execute(update(Mode).where(Mode.name == "sway").values(frequency_hz=1e-80))
    finally:
        store.close()
    res = CliRunner().invoke(cli, ["bumptest", str(stream), "--record", "--database", database_url,
                                   "--force-point", "hammer", "--json", "--band", "10", "200"])
    assert res.exit_code == 0, res.output
    assert "'sway'" in res.output and "'frequency_hz'" in res.output  # the warning names it


@pytest.mark.broker
def test_running_service_follows_edits_and_restarts_idle_machines(fresh_mosquitto, plant_url: str,
                                                                  api: Api) -> None:
    from broker import publish_many
    from service_helpers import measurement_count, wait_for

    from monitor.store.models import BaselineRestart

    settings = load_settings(None, env={}, overrides={
        "broker.url": fresh_mosquitto.url, "database.url": plant_url, "broker.client_id": "svc-live",
        "broker.reconnect_max_s": 1.0})
    svc = Service(settings, stale_check_s=0)
    svc.start()
    try:
        publish_many(fresh_mosquitto, waveforms("rwp-1", 0, 4) + waveforms("ab-1", 0, 3))
        assert wait_for(lambda: measurement_count(plant_url)[0] >= 7, 30)
        mid = api.call("GET", "/machines/rwp-1/modes").get_json()["items"][0]["id"]
        assert api.call("PUT", f"/machines/rwp-1/modes/{mid}", {"frequency_hz": 80.0}).status_code == 200
        # ab-1 sends nothing more: its restart is the periodic pass's to apply.
        assert api.call("POST", "/machines/ab-1/baseline", {"point": None, "comment": "overhaul"}).status_code == 202

        def applied() -> bool:
            store = Store.open(plant_url)
            try:
                with store.session() as s:
                    return s.scalar(select(BaselineRestart.applied_at)) is not None
            finally:
                store.close()

        assert wait_for(applied, 10)
        publish_many(fresh_mosquitto, waveforms("rwp-1", 4, 1))
        assert wait_for(lambda: measurement_count(plant_url)[0] >= 8, 30)
        assert {r["mode_hz"] for r in newest_evaluation(plant_url, "rwp-1")["margins"]} == {80.0}
        assert all(n == 0 for n in stored_baselines(plant_url, "ab-1").values())
    finally:
        svc.stop()
