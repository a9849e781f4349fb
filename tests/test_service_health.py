"""Honest health: /healthz and /readyz of a running `whirlwatch run` through real outages.

The database is cut off without touching the shared server: PostgreSQL through a loopback
relay (tests/tcp_relay.py) that refuses connections or falls silent for 20 s, SQLite on a
small tmpfs filled to the last byte (a real ENOSPC, which SQLite reports as SQLITE_FULL,
"database or disk is full"; sqlite.org/rescode.html#full). The broker is stopped and
started again. Throughout, readings are published at a steady pace as sensors would. The
service must report 503 (ok false) within 30 s of each cut (issue 11, "Honest health"),
200 again after it, and store every published reading exactly once (at-least-once
delivery from the broker, docs/mqtt.md, made effectively-once by the store).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import threading
import time
import urllib.error
import urllib.request
from collections.abc import Callable, Iterator
from pathlib import Path

import paho.mqtt.client as paho
import pytest
from broker import PrivateBroker, free_port
from fixtures_db import fresh_database
from paho.mqtt.enums import CallbackAPIVersion
from service_helpers import (
    ROOT,
    measurement_count,
    plant_store,
    traffic,
    wait_for,
    wait_started,
    waveform_keys,
)
from sqlalchemy.engine import make_url
from tcp_relay import relayed_postgres_url

pytestmark = [pytest.mark.broker, pytest.mark.slow]

#: The issue's bound: unhealthy within this long after the cut, s.
DETECT_S = 30.0
#: How long each outage lasts, s (issue 11).
OUTAGE_S = 20.0
SECRET = "pw-not-for-logs-7731"


def get(port: int, path: str) -> tuple[int, dict]:
    """(status, JSON body; {} when the body is not JSON) of GET ``path``."""
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}{path}", timeout=3) as r:
            code, body = r.status, r.read()
    except urllib.error.HTTPError as exc:
        code, body = exc.code, exc.read()
    try:
        return code, json.loads(body)
    except ValueError:
        return code, {}


class HealthLog:
    """Polls ``/healthz`` and ``/readyz`` every 0.25 s in a thread; keeps
    (monotonic s, healthz status, readyz status, healthz body)."""

    def __init__(self, port: int) -> None:
        self.port = port
        self.rows: list[tuple[float, int, int, dict]] = []
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def _run(self) -> None:
        while not self._stop.wait(0.25):
            try:
                code, body = get(self.port, "/healthz")
                ready, _ = get(self.port, "/readyz")
            except OSError:
                continue  # not listening yet
            self.rows.append((time.monotonic(), code, ready, body))

    def first(self, after: float, code: int) -> tuple[float, dict] | None:
        """(time, body) of the first /healthz answer ``code`` at or after ``after``."""
        return next(((t, b) for t, c, _, b in list(self.rows) if t >= after and c == code), None)

    def close(self) -> None:
        self._stop.set()
        self._thread.join(5)


class PacedPublisher:
    """Publishes ``messages`` at QoS 1 one every ``every_s`` seconds, as sensors would,
    waiting for each PUBACK (paho directly, independent of the code under test)."""

    def __init__(self, broker: PrivateBroker, messages: list[tuple[str, bytes]], every_s: float) -> None:
        self.client = paho.Client(CallbackAPIVersion.VERSION2, protocol=paho.MQTTv5)
        self.client.connect(broker.host, broker.port)
        self.client.loop_start()
        self.messages, self.every_s = messages, every_s
        self.sent = 0
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def _run(self) -> None:
        for topic, payload in self.messages:
            info = self.client.publish(topic, payload, qos=1)
            info.wait_for_publish(30)
            self.sent += 1
            time.sleep(self.every_s)

    def join(self, timeout_s: float) -> None:
        self._thread.join(timeout_s)
        self.client.disconnect()
        self.client.loop_stop()


def start_service(broker: PrivateBroker, db_url: str, workdir: Path, port: int, client_id: str
                  ) -> subprocess.Popen:
    cmd = [sys.executable, "-c", "from monitor.cli import main; main()", "run", "--broker", broker.url,
           "--database", db_url, "--client-id", client_id, "--metrics", f"127.0.0.1:{port}"]
    env = dict(os.environ, WHIRLWATCH_SERVICE_DATA_DIR=str(workdir))
    with open(workdir / f"{client_id}.log", "ab") as log:
        proc = subprocess.Popen(cmd, stdout=log, stderr=subprocess.STDOUT, env=env, cwd=ROOT)
    wait_started(workdir, client_id)
    return proc


def outage(broker: PrivateBroker, db_url: str, tmp_path: Path, cut: Callable[[], None],
           restore: Callable[[], None], client_id: str, count_url: str | None = None) -> dict:
    """Run the service, publish the fan's traffic at a steady pace, ``cut`` after 5 s,
    ``restore`` OUTAGE_S later; returns the figures and checks the common promises."""
    port = free_port()
    msgs = traffic("ef-2", 0, 160)
    want = len(waveform_keys(msgs))
    count_url = count_url or db_url
    proc = start_service(broker, db_url, tmp_path, port, client_id)
    health = HealthLog(port)
    sender = None
    try:
        assert wait_for(lambda: health.first(0, 200) is not None, 10, 0.1), "never healthy"
        sender = PacedPublisher(broker, msgs, 0.2)
        time.sleep(5.0)
        t_cut = time.monotonic()
        cut()
        time.sleep(OUTAGE_S)
        t_restore = time.monotonic()
        restore()
        sender.join(120)
        assert wait_for(lambda: measurement_count(count_url)[0] >= want, 90, 0.5), measurement_count(count_url)
        assert wait_for(lambda: (health.first(time.monotonic() - 0.5, 200)) is not None, 30, 0.25)
    finally:
        health.close()
        if sender is not None:
            sender.join(5)
        proc.send_signal(signal.SIGTERM)
        proc.wait(60)
    log = (tmp_path / f"{client_id}.log").read_text(errors="replace")
    assert proc.returncode == 0, log[-3000:]
    before = [c for t, c, _, _ in health.rows if t < t_cut]
    assert before and set(before) == {200}, before
    bad = health.first(t_cut, 503)
    assert bad is not None, "never unhealthy during the outage"
    detect_s = bad[0] - t_cut
    assert detect_s <= DETECT_S, detect_s
    assert bad[1]["ok"] is False and bad[1]["problems"]
    # The readiness view agrees while the outage lasts.
    assert any(r == 503 for t, _, r, _ in health.rows if bad[0] <= t <= t_restore)
    good = health.first(t_restore, 200)
    assert good is not None
    # Every published reading stored exactly once.
    assert measurement_count(count_url) == (want, want)
    # Every line of the log is a JSON object, and no password reached it.
    for line in log.splitlines():
        json.loads(line)
    assert SECRET not in log
    if os.environ.get("WW_HEALTH_TRACE"):
        for t, c, _, b in health.rows:
            print(f"{t - t_cut:7.2f} {c} {b['problems']} backlog={b['backlog']} waiting={b['waiting_s']}")
    return {"detect_s": detect_s, "recover_s": good[0] - t_restore, "unhealthy": bad[1], "log": log}


@pytest.fixture()
def pg_plant(tmp_path: Path) -> Iterator[str]:
    with fresh_database("postgresql", tmp_path) as url:
        plant_store(url)
        yield url


def through_relay(url: str, relayed: str) -> str:
    """The relayed URL with a password that trust authentication ignores: it must never
    be logged."""
    return make_url(relayed).set(password=SECRET).render_as_string(hide_password=False)


@pytest.mark.postgres
def test_refused_database_turns_health_503_and_back(fresh_mosquitto: PrivateBroker, pg_plant: str,
                                                    tmp_path: Path) -> None:
    with relayed_postgres_url(pg_plant) as (relayed, relay):
        fig = outage(fresh_mosquitto, through_relay(pg_plant, relayed), tmp_path, relay.refuse, relay.restore,
                     "svc-refused", count_url=pg_plant)
    problems = " ".join(fig["unhealthy"]["problems"])
    assert "database" in problems or "without a commit" in problems, problems
    assert '"database work failed; retrying"' in fig["log"]
    print(f"refused: unhealthy after {fig['detect_s']:.1f} s, healthy {fig['recover_s']:.1f} s after restore")


@pytest.mark.postgres
def test_silent_database_turns_health_503_is_logged_and_recovers(fresh_mosquitto: PrivateBroker, pg_plant: str,
                                                                 tmp_path: Path) -> None:
    with relayed_postgres_url(pg_plant) as (relayed, relay):
        fig = outage(fresh_mosquitto, through_relay(pg_plant, relayed), tmp_path, relay.silence, relay.restore,
                     "svc-silent", count_url=pg_plant)
    # The silence itself is logged: the connection that waited past the service's limit
    # was closed (the URL shown without its password), and health turned bad.
    log = fig["log"]
    assert '"database connection silent; closed it"' in log, log[-3000:]
    assert '"service unhealthy"' in log and '"service healthy again"' in log
    assert any("database" in p or "without a commit" in p for p in fig["unhealthy"]["problems"])
    print(f"silent: unhealthy after {fig['detect_s']:.1f} s, healthy {fig['recover_s']:.1f} s after restore")


@pytest.fixture()
def small_disk(tmp_path: Path) -> Iterator[Path]:
    """A 24 MiB tmpfs mounted for this test (needs CAP_SYS_ADMIN; skipped otherwise)."""
    mnt = tmp_path / "disk"
    mnt.mkdir()
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=24m", "tmpfs", str(mnt)],
                       capture_output=True, text=True, check=False)
    if r.returncode != 0:
        pytest.skip(f"cannot mount a small tmpfs here: {r.stderr.strip() or r.returncode}")
    try:
        yield mnt
    finally:
        subprocess.run(["umount", "-l", str(mnt)], check=False)


def fill(directory: Path) -> Path:
    """Write a file until the filesystem has no byte left (ENOSPC)."""
    path = directory / "filler"
    block = b"\0" * (1 << 16)
    with open(path, "wb", buffering=0) as f:
        while True:
            try:
                f.write(block)
            except OSError:
                break
        for size in (4096, 512, 1):  # the last partial blocks
            while True:
                try:
                    f.write(b"\0" * size)
                except OSError:
                    break
    return path


def test_full_disk_turns_health_503_and_back(fresh_mosquitto: PrivateBroker, small_disk: Path,
                                             tmp_path: Path) -> None:
    url = f"sqlite:///{small_disk / 'store.sqlite'}"
    plant_store(url)
    filler: list[Path] = []
    fig = outage(fresh_mosquitto, url, tmp_path, lambda: filler.append(fill(small_disk)),
                 lambda: filler[0].unlink(), "svc-disk")
    assert "full" in fig["log"], fig["log"][-3000:]
    print(f"disk full: unhealthy after {fig['detect_s']:.1f} s, healthy {fig['recover_s']:.1f} s after restore")


def test_broker_away_turns_health_503_and_back(fresh_mosquitto: PrivateBroker, tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path / 'store.sqlite'}"
    plant_store(url)
    port = free_port()
    proc = start_service(fresh_mosquitto, url, tmp_path, port, "svc-broker")
    health = HealthLog(port)
    try:
        assert wait_for(lambda: health.first(0, 200) is not None, 10, 0.1)
        t_cut = time.monotonic()
        fresh_mosquitto.stop()
        assert wait_for(lambda: health.first(t_cut, 503) is not None, DETECT_S, 0.1)
        t_restore = time.monotonic()
        fresh_mosquitto.start()
        assert wait_for(lambda: health.first(t_restore, 200) is not None, 60, 0.25)
    finally:
        health.close()
        proc.send_signal(signal.SIGTERM)
        proc.wait(60)
    t, body = health.first(t_cut, 503)
    assert body["connected"] is False and any("broker" in p for p in body["problems"])
    print(f"broker away: unhealthy after {t - t_cut:.1f} s")
