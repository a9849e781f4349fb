"""SIGKILL the service mid-stream and restart it; two services in a shared subscription.

Delivery contract (docs/mqtt.md): at least once from the broker, effectively once
in the database, so every published waveform ends with exactly one measurement row.
"""

from __future__ import annotations

import random
import signal
import threading
from pathlib import Path

import pytest
from broker import PrivateBroker, publish_many
from fixtures_db import fresh_database
from service_helpers import (
    measurement_count,
    plant_store,
    service_process,
    traffic,
    wait_for,
    wait_started,
    waveform_keys,
)

pytestmark = [pytest.mark.broker, pytest.mark.slow]


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def db_url(request: pytest.FixtureRequest, tmp_path: Path):
    with fresh_database(request.param, tmp_path) as url:
        plant_store(url)
        yield url


def test_sigkill_at_random_moments_loses_and_duplicates_nothing(
    fresh_mosquitto: PrivateBroker, db_url: str, tmp_path: Path
) -> None:
    msgs = traffic("rwp-1", 0, 100) + traffic("ab-1", 0, 50)  # both within the 30-day age limit
    want = len(waveform_keys(msgs))
    rng = random.Random(20260302)
    # The first start creates the persistent session, so the broker queues for it from then on.
    proc = service_process(fresh_mosquitto.url, db_url, tmp_path)
    wait_started(tmp_path, "svc", 1)
    sender = threading.Thread(target=publish_many, args=(fresh_mosquitto, msgs), kwargs={"timeout_s": 120})
    sender.start()
    kills = 0
    try:
        for k in range(5):
            # A random moment: the service has been up between 0.3 and 1.5 s.
            threading.Event().wait(rng.uniform(0.3, 1.5))
            proc.send_signal(signal.SIGKILL)
            proc.wait(10)
            kills += 1
            proc = service_process(fresh_mosquitto.url, db_url, tmp_path)
            wait_started(tmp_path, "svc", k + 2)
        sender.join(120)
        assert wait_for(lambda: measurement_count(db_url)[0] >= want, 120, 0.5)
        threading.Event().wait(1.0)  # anything redelivered late must still change nothing
    finally:
        proc.send_signal(signal.SIGTERM)
        proc.wait(30)
    assert kills >= 5
    assert measurement_count(db_url) == (want, want)
    log = (tmp_path / "svc.log").read_text(errors="replace")
    assert proc.returncode == 0, log[-2000:]
    assert log.count('"service stopped"') == 1  # only the final SIGTERM was a clean stop


def test_two_processes_share_the_stream_exactly_once(fresh_mosquitto: PrivateBroker, tmp_path: Path) -> None:
    with fresh_database("postgresql", tmp_path) as url:
        plant_store(url)
        procs = [service_process(fresh_mosquitto.url, url, tmp_path, client_id=f"svc-{i}", group="g")
                 for i in range(2)]
        for i in range(2):
            wait_started(tmp_path, f"svc-{i}", 1)
        msgs = traffic("rwp-1", 0, 120) + traffic("ef-2", 0, 120)
        want = len(waveform_keys(msgs))
        publish_many(fresh_mosquitto, msgs)
        assert wait_for(lambda: measurement_count(url)[0] >= want, 90, 0.5)
        threading.Event().wait(1.0)
        for p in procs:
            p.send_signal(signal.SIGTERM)
        for p in procs:
            p.wait(30)
        assert measurement_count(url) == (want, want)
        # Both processes took part (the broker splits a shared subscription between them).
        for i in range(2):
            log = (tmp_path / f"svc-{i}.log").read_text(errors="replace")
            assert '"service stopped"' in log
