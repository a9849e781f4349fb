"""The backlog a MessageSource reports (messages received and not yet acknowledged) stays
true across reconnects: health reads it (docs/service.md, "Health").

MQTT 5.0 (OASIS 2019) section 4.4: on a reconnect with a session present the broker resends
the unacknowledged messages (DUP set); the copies still queued from the old connection are
dropped, and they must stop counting as in flight.
"""

from __future__ import annotations

import threading
import uuid

import pytest
from broker import PrivateBroker, publish_many, wait_until

from monitor.io.mqtt_settings import MqttSettings
from monitor.io.mqtt_source import InboundMessage, MessageSource

pytestmark = pytest.mark.broker


def test_backlog_returns_to_zero_after_a_reconnect_drops_queued_copies(fresh_mosquitto: PrivateBroker) -> None:
    prefix = f"backlog-{uuid.uuid4().hex[:8]}"
    settings = MqttSettings(url=fresh_mosquitto.url, client_id=f"svc-{uuid.uuid4().hex[:8]}", prefix=prefix,
                            receive_maximum=16, reconnect_min_s=0.1, reconnect_max_s=0.5)
    source = MessageSource(settings)
    hold = threading.Event()
    seen: list[bytes] = []

    def handler(batch: list[InboundMessage]) -> None:
        hold.wait(30)  # the worker is busy while more arrive
        for m in batch:
            seen.append(m.payload)
            source.ack(m)

    source.start_batches(handler, max_batch=1)
    try:
        assert source.wait_subscribed(10), source.last_error
        msgs = [(f"{prefix}/fan-1/de-h/waveform", f"m{i}".encode()) for i in range(10)]
        publish_many(fresh_mosquitto, msgs)
        assert wait_until(lambda: source.stats.received >= 10, 10)
        assert source.stats.in_flight == 10 and source.waiting_s() > 0
        connects = source.stats.connects
        fresh_mosquitto.restart()  # clean stop: the session and its unacknowledged messages persist
        assert wait_until(lambda: source.stats.connects > connects and source.stats.stale_dropped > 0, 15)
        hold.set()
        assert wait_until(lambda: {p.decode() for p in seen} >= {f"m{i}" for i in range(10)}, 15)
        assert wait_until(lambda: source.stats.in_flight == 0, 5), source.stats
        assert source.waiting_s() == 0.0
    finally:
        hold.set()
        source.stop()
