"""Broker durability: what a Mosquitto crash (SIGKILL) keeps, with deploy/mosquitto.conf's own
persistence settings, and the service's in-flight bound while a backlog drains.

The broker here runs the broker-wide directives of deploy/mosquitto.conf as written there
(tests/broker.py, ``PrivateBroker.with_deploy_settings``), so these tests measure the file a
site installs. The readings are the sample plant's, published at QoS 1 as a sensor would; the
service is the real one (a child process, or in-process where its counters are read) and the
store a real SQLite database.

Protocol facts relied on (OASIS MQTT Version 5.0, 2019): 4.3.2 QoS 1 delivery (the PUBACK
gives ownership of the message to the receiver), 3.1.2.11.2 Session Expiry Interval (the
server keeps the session and queues messages for it while the client is away), 3.1.2.11.3
Receive Maximum (the server sends no more than this many unacknowledged QoS 1 messages).
Mosquitto's persistence (mosquitto.conf(5), ``persistence``, ``autosave_interval``,
``autosave_on_changes``) writes its whole in-memory state to the file at each save.
"""

from __future__ import annotations

import signal
import threading
import time
from pathlib import Path

import pytest
from broker import PrivateBroker, publish_many
from service_helpers import (
    measurement_count,
    plant_store,
    service_process,
    traffic,
    wait_for,
    wait_started,
    waveform_keys,
)
from sqlalchemy import func, select

from monitor.config import load_settings
from monitor.io.mqtt_settings import MqttSettings
from monitor.io.mqtt_source import InboundMessage, MessageSource
from monitor.service.service import Service
from monitor.store import Store
from monitor.store.models import Measurement

pytestmark = [pytest.mark.broker, pytest.mark.slow]


def plant_traffic() -> list[tuple[str, bytes]]:
    """Four machines of the sample plant, the last 27 days of each stream (inside the
    service's 30-day age limit): 324 messages, 270 of them waveforms of 11-44 kB."""
    return traffic("rwp-1", 60) + traffic("bwm-1", 60) + traffic("sp-2", 30) + traffic("ab-1", 30)


@pytest.fixture()
def sqlite_url(tmp_path: Path) -> str:
    url = f"sqlite:///{tmp_path / 'store.sqlite'}"
    plant_store(url)
    return url


def _stored(url: str, machine: str) -> int:
    """Measurements stored for ``machine``."""
    store = Store.open(url)
    try:
        with store.session() as s:
            return int(s.scalar(select(func.count()).select_from(Measurement)
                                .where(Measurement.machine_id == machine)) or 0)
    finally:
        store.close()


def _register_session(broker: PrivateBroker, url: str, workdir: Path) -> None:
    """Start the service once and stop it cleanly: the broker now keeps its persistent
    session (MQTT 5.0 section 3.1.2.11.2) and queues every reading for it."""
    proc = service_process(broker.url, url, workdir)
    try:
        wait_started(workdir, "svc", 1)
    finally:
        proc.send_signal(signal.SIGTERM)
        proc.wait(30)


def _drain(broker: PrivateBroker, url: str, workdir: Path, at_least: int, starts: int) -> tuple[int, int]:
    """Start the service again, wait until ``at_least`` rows are stored (or 90 s) and 1.5 s
    more, stop it; return (rows, distinct readings) in the store."""
    proc = service_process(broker.url, url, workdir)
    try:
        wait_started(workdir, "svc", starts)
        wait_for(lambda: measurement_count(url)[0] >= at_least, 90, 0.25)
        time.sleep(1.5)  # the rest of the queue, and a late redelivery must change nothing
    finally:
        proc.send_signal(signal.SIGTERM)
        proc.wait(30)
    return measurement_count(url)


def test_broker_sigkill_keeps_every_reading_it_acknowledged(
    deploy_mosquitto: PrivateBroker, sqlite_url: str, tmp_path: Path
) -> None:
    broker = deploy_mosquitto
    msgs = plant_traffic()
    want = len(waveform_keys(msgs))
    _register_session(broker, sqlite_url, tmp_path)

    # The service is away; the broker acknowledges every reading (publish_many waits for
    # each PUBACK) and queues it in the service's session.
    publish_many(broker, msgs, timeout_s=120)
    # One more round trip through the broker (a new connection and a publish nobody
    # subscribes to): Mosquitto handles packets in passes of its single loop and saves
    # after a pass, so an answer in a later pass proves the pass that acknowledged the
    # last reading has saved. deploy/mosquitto.conf states this window.
    publish_many(broker, [("durability-test/marker", b"1")])
    broker.kill()  # SIGKILL: no shutdown save
    broker.start()

    rows, distinct = _drain(broker, sqlite_url, tmp_path, want, starts=2)
    # At least once from the broker, once in the store (docs/mqtt.md, "Delivery semantics").
    assert (rows, distinct) == (want, want), broker.log_tail()


def test_broker_sigkill_right_after_a_puback_loses_at_most_that_pass(
    deploy_mosquitto: PrivateBroker, sqlite_url: str, tmp_path: Path
) -> None:
    """The window that remains: a kill between the PUBACK and the end of the save of the
    same pass. One publishing connection over plain TCP has one packet read per pass
    (mosquitto 2.0 reads one packet per ready socket per pass), so at most one reading."""
    broker = deploy_mosquitto
    msgs = plant_traffic()
    want = len(waveform_keys(msgs))
    _register_session(broker, sqlite_url, tmp_path)

    publish_many(broker, msgs, timeout_s=120)
    broker.kill()  # at once: the last pass may still be saving
    broker.start()

    rows, distinct = _drain(broker, sqlite_url, tmp_path, want - 1, starts=2)
    assert rows == distinct
    assert want - 1 <= rows <= want, (rows, want)
    if rows < want:  # the one lost is the last one published (ab-1's newest reading)
        assert _stored(sqlite_url, "ab-1") == len(waveform_keys(traffic("ab-1", 30))) - 1


def test_in_flight_stays_within_receive_maximum_while_a_backlog_drains(
    deploy_mosquitto: PrivateBroker, sqlite_url: str
) -> None:
    """The service's own count of received, unacknowledged messages never exceeds the
    Receive Maximum it announces (MQTT 5.0 section 3.1.2.11.3), whatever the broker sends."""
    broker = deploy_mosquitto
    settings = load_settings(None, env={}, overrides={
        "broker.url": broker.url, "database.url": sqlite_url, "broker.client_id": "svc-inflight",
        "broker.reconnect_max_s": 1.0,
    })
    window = settings.broker.receive_maximum
    first = Service(settings)
    first.start()
    first.stop()  # the session stays at the broker and queues what follows

    msgs = plant_traffic()
    want = len(waveform_keys(msgs))
    publish_many(broker, msgs, timeout_s=120)

    svc = Service(settings)
    peak = {"health": 0}
    done = threading.Event()

    def watch() -> None:
        while not done.is_set():
            peak["health"] = max(peak["health"], int(svc.health()["in_flight"]))
            time.sleep(0.002)

    svc.start()
    watcher = threading.Thread(target=watch, daemon=True)
    watcher.start()
    try:
        assert wait_for(lambda: measurement_count(sqlite_url)[0] >= want, 90, 0.25)
    finally:
        done.set()
        watcher.join(5)
        svc.stop()
    stats = svc.source.stats
    assert measurement_count(sqlite_url) == (want, want)
    assert stats.acked == stats.received  # nothing left unacknowledged after the drain
    # The backlog filled the window at once, and the count never went beyond it.
    assert stats.in_flight_high_water == window, (stats, window, peak)
    assert peak["health"] <= window


def test_in_flight_count_returns_to_zero_after_a_broker_restart(fresh_mosquitto: PrivateBroker) -> None:
    """Messages handed off before a reconnect and dropped as stale (the broker resends them,
    MQTT 5.0 section 4.4) give their slot back: the count is what is really held."""
    broker = fresh_mosquitto
    settings = MqttSettings(url=broker.url, client_id="svc-restart", prefix="restart", receive_maximum=8,
                            reconnect_min_s=0.1, reconnect_max_s=0.5)
    source = MessageSource(settings)
    seen: set[bytes] = set()
    published = threading.Event()
    restarted = threading.Event()

    def slow(message: InboundMessage) -> None:
        # Nothing is handled until every message is at the broker; after the first 20 the
        # handler waits for the broker's restart, then goes slowly until the source has
        # reconnected: the hand-off queue still holds the old connection's messages when it
        # does, however fast or slow the machine is. (A full window blocks the network
        # thread, so the handler cannot simply wait for the reconnection itself.)
        published.wait(60)
        if len(seen) >= 20:
            restarted.wait(30)
        time.sleep(0.5 if restarted.is_set() and source.stats.connects < 2 else 0.02)
        seen.add(message.payload)
        source.ack(message)

    source.start(slow)
    assert source.wait_subscribed(10), source.last_error
    try:
        n = 150
        publish_many(broker, [("restart/fan-1/de-h/waveform", b"m%d" % i) for i in range(n)])
        published.set()
        assert wait_for(lambda: len(seen) >= 20, 10, 0.01)
        broker.restart()  # clean stop: the session and its unacknowledged messages are kept
        restarted.set()
        assert wait_for(lambda: len(seen) >= n, 30, 0.05)
        assert wait_for(lambda: source.stats.in_flight == 0, 5, 0.01)
    finally:
        restarted.set()
        source.stop()
    assert seen == {b"m%d" % i for i in range(n)}
    assert source.stats.stale_dropped > 0  # the path under test ran
    assert source.stats.in_flight == 0
    assert source.stats.in_flight_high_water <= settings.receive_maximum
