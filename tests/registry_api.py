"""Helpers for the tests of registry edits: the service's settings with no broker, the JSON
API as an engineer with a token, sample waveforms, the newest stored evaluation, and a
batch bounded in time."""

from __future__ import annotations

import threading
from pathlib import Path

import pytest
from service_helpers import plant_store, traffic
from sqlalchemy import select

from dashboard import create_app
from monitor.config import load_settings
from monitor.service.service import Service
from monitor.store import Store, create_api_token, create_user
from monitor.store.models import Measurement


def settings_for(url: str, machines_file: Path | None = None):
    overrides = {"broker.url": "mqtt://127.0.0.1:1", "database.url": url,
                 "broker.client_id": "svc-registry"}
    if machines_file is not None:
        overrides["service.machines_file"] = str(machines_file)
    return load_settings(None, env={}, overrides=overrides)


class Api:
    """The JSON API through Flask's test client, as an engineer with an API token."""

    def __init__(self, url: str) -> None:
        self.app = create_app({"DATABASE_URL": url, "SECRET_KEY": "t", "TESTING": True})
        store = Store.open(url)
        try:
            with store.transaction() as s:
                create_user(s, "eng", "engineer-pass-1", "engineer")
                create_user(s, "vic", "viewer-pass-1", "viewer")
                self.token = create_api_token(s, "eng", "tests")
                self.viewer_token = create_api_token(s, "vic", "tests")
        finally:
            store.close()
        self.client = self.app.test_client()

    def call(self, method: str, path: str, body: dict | None = None, *, viewer: bool = False):
        tok = self.viewer_token if viewer else self.token
        return self.client.open(f"/api/v1{path}", method=method, json=body,
                                headers={"Authorization": f"Bearer {tok}"})

    def close(self) -> None:
        self.app.extensions["whirlwatch_engine"].dispose()


def waveforms(name: str, start: int, n: int) -> list[tuple[str, bytes]]:
    """``n`` waveform messages of one sample stream from the ``start``-th of its last 40
    (the stream retimed to end now; its first weeks lie beyond the ingest age limit)."""
    msgs = [m for m in traffic(name) if m[0].endswith("/waveform")][-40:]
    assert len(msgs) >= start + n
    return msgs[start:start + n]


def newest_evaluation(url: str, machine: str) -> dict:
    store = Store.open(url)
    try:
        with store.session() as s:
            return s.scalar(select(Measurement.evaluation).where(Measurement.machine_id == machine)
                            .order_by(Measurement.ts.desc()).limit(1))
    finally:
        store.close()


def run_bounded(svc: Service, messages: list[tuple[str, bytes]], timeout_s: float = 30.0):
    """``svc.handle_batch(messages)``, failing the test (and stopping the service's retry
    loop) when it has not committed within ``timeout_s``."""
    out: dict = {}

    def work() -> None:
        try:
            out["outcomes"] = svc.handle_batch(messages)
        except BaseException as exc:  # reported below
            out["error"] = exc

    t = threading.Thread(target=work, daemon=True)
    t.start()
    t.join(timeout_s)
    if t.is_alive():
        svc.request_stop()
        t.join(30.0)
        pytest.fail(f"the batch did not commit within {timeout_s:g} s (retrying for ever)")
    if "error" in out:
        raise out["error"]
    return out["outcomes"]


@pytest.fixture()
def plant_url(database_url: str) -> str:
    """``database_url`` with the sample plant's registry imported."""
    plant_store(database_url)
    return database_url


@pytest.fixture()
def api(plant_url: str):
    """The JSON API on ``plant_url`` as an engineer with a token (:class:`Api`)."""
    a = Api(plant_url)
    yield a
    a.close()
