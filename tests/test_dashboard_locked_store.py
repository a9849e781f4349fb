"""Dashboard writes while another process writes the same SQLite file (the service's batch
writer): the write waits for SQLite's lock instead of failing, and a lock held past the
busy timeout answers 503 with Retry-After, nothing changed, instead of a 500."""

from __future__ import annotations

import sqlite3
import threading
import time
from contextlib import closing

import pytest
from dashboard_signin import Browser, make_app, seed_template, seeded_copy

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def template(tmp_path_factory):
    return seed_template(tmp_path_factory.mktemp("locked"))


@pytest.fixture()
def db_path(template, tmp_path):
    return seeded_copy(template, tmp_path).removeprefix("sqlite:///")


def _alarm_state(path: str, alarm_id: int) -> str:
    with closing(sqlite3.connect(path)) as conn:
        return conn.execute("SELECT state FROM alarms WHERE id = ?", (alarm_id,)).fetchone()[0]


def _other_writer(path: str, hold_s: float, holding: threading.Event) -> threading.Thread:
    """Another process's writer: takes the write lock, changes a row and commits after
    ``hold_s``, as the service's batch does."""

    def run() -> None:
        with closing(sqlite3.connect(path, timeout=5, isolation_level=None)) as conn:
            conn.execute("BEGIN IMMEDIATE")
            conn.execute("UPDATE users SET session_version = session_version + 1 WHERE name = 'vic'")
            holding.set()
            time.sleep(hold_s)
            conn.execute("COMMIT")

    t = threading.Thread(target=run, daemon=True)
    t.start()
    assert holding.wait(5)
    return t


def test_an_acknowledgement_waits_for_the_other_writer(db_path):
    app = make_app(f"sqlite:///{db_path}")
    try:
        browser = Browser(app).signed_in("eng")
        token = browser.csrf("/alarms/")
        assert _alarm_state(db_path, 1) == "active"
        writer = _other_writer(db_path, 0.8, threading.Event())
        # A transaction that read before the other writer committed cannot then write in
        # SQLite (SQLITE_BUSY_SNAPSHOT, https://www.sqlite.org/isolation.html): the request
        # holds the lock from its start, so it waits for the busy timeout instead.
        r = browser.client.post("/alarms/1/acknowledge", data={"csrf_token": token, "comment": "seen"})
        writer.join(5)
        assert r.status_code == 302, r.get_data(as_text=True)[:300]
        assert _alarm_state(db_path, 1) == "acknowledged"
    finally:
        app.extensions["whirlwatch_engine"].dispose()


def test_a_lock_held_past_the_busy_timeout_answers_503(db_path):
    app = make_app(f"sqlite:///{db_path}", DATABASE_BUSY_TIMEOUT_MS=200)
    try:
        browser = Browser(app).signed_in("eng")
        token = browser.csrf("/alarms/")
        writer = _other_writer(db_path, 2.0, threading.Event())
        r = browser.client.post("/api/v1/alarms/1/acknowledge", json={"comment": "seen"},
                                headers={"X-CSRFToken": token})
        page = browser.client.post("/alarms/1/acknowledge", data={"csrf_token": token, "comment": "seen"})
        writer.join(5)
        # RFC 9110, section 15.6.4: 503 for a temporary overload, with Retry-After (10.2.3).
        assert r.status_code == 503, r.get_data(as_text=True)[:300]
        assert r.get_json()["error"]["code"] == "database_unavailable"
        assert int(r.headers["Retry-After"]) > 0
        assert page.status_code == 503
        assert "nothing was changed" in page.get_data(as_text=True)
        assert _alarm_state(db_path, 1) == "active"
    finally:
        app.extensions["whirlwatch_engine"].dispose()
