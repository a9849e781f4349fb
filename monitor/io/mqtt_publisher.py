"""Outbound messages: the retained machine status and the alarm events, at QoS 1.

:class:`Publisher` either waits for the broker's acknowledgement or hands a message to
paho's bounded outbound queue (sent and resent until acknowledged) so the caller does not
wait. Topics and payloads are in docs/mqtt.md.
"""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Mapping
from typing import Any

import paho.mqtt.client as paho

from monitor.io.mqtt_settings import MqttError, MqttSettings, connect_async, make_client


class Publisher:
    """Publishes retained machine status and alarm events at QoS 1.

    Uses its own connection (client id ``{client_id}-out``) with a clean session: it
    subscribes to nothing, so there is no session worth keeping.
    """

    #: Most messages waiting in paho's outbound queue (not yet acknowledged by the broker).
    MAX_QUEUED = 10_000

    def __init__(self, settings: MqttSettings) -> None:
        self.settings = settings
        self._connected = threading.Event()
        self._client = make_client(
            settings, f"{settings.client_id}-out", manual_ack=False, persistent=False
        )
        self._client.on_connect = self._on_connect
        self._client.on_disconnect = self._on_disconnect
        # Bounded: while the broker is away at most this many messages wait in memory.
        self._client.max_queued_messages_set(self.MAX_QUEUED)
        # Packet ids published without waiting and not yet acknowledged (for flush).
        self._pending: set[int] = set()
        self._early: set[int] = set()
        self._pending_lock = threading.Lock()
        self._client.on_publish = self._on_publish

    def _on_connect(self, _c: paho.Client, _u: Any, _f: Any, reason: Any, _p: Any) -> None:
        if self._client.connack(reason):
            self._connected.set()

    def _on_disconnect(self, _c: paho.Client, _u: Any, _f: Any, reason: Any, _p: Any) -> None:
        self._connected.clear()
        self._client.closed(reason)

    @property
    def connected(self) -> bool:
        return self._connected.is_set()

    def _on_publish(self, _c: paho.Client, _u: Any, mid: int, _r: Any, _p: Any) -> None:
        with self._pending_lock:
            if mid in self._pending:
                self._pending.discard(mid)
            elif len(self._early) < self.MAX_QUEUED:
                self._early.add(mid)

    def start(self, timeout_s: float = 10.0) -> None:
        """Connect; raise :class:`MqttError` if not connected within ``timeout_s`` seconds."""
        connect_async(self._client, self.settings, persistent=False)
        self._client.loop_start()
        if not self._connected.wait(timeout_s):
            why = self._client.failure or "no answer"
            raise MqttError(
                f"no connection to the broker at {self.settings.shown_url} within {timeout_s:g} s: {why}."
            )

    def publish(
        self, topic: str, payload: bytes, *, retain: bool = False, timeout_s: float = 10.0,
        wait: bool = True,
    ) -> None:
        """Publish at QoS 1; with ``wait``, wait for the broker's PUBACK (:class:`MqttError`
        if none). Without it the message goes to paho's outbound queue (sent, and resent
        after a reconnect, until acknowledged; :meth:`flush` waits for them);
        :class:`MqttError` only when that queue is full."""
        info = self._client.publish(topic, payload, qos=1, retain=retain)
        if info.rc == paho.MQTT_ERR_QUEUE_SIZE:
            raise MqttError(
                f"publishing to {topic!r} failed: {self.MAX_QUEUED} messages already wait for the broker."
            )
        if not wait:
            with self._pending_lock:
                # The PUBACK may already have come (on_publish ran first).
                if info.mid in self._early:
                    self._early.discard(info.mid)
                else:
                    self._pending.add(info.mid)
            return
        try:
            info.wait_for_publish(timeout_s)
        except (ValueError, RuntimeError) as exc:
            raise MqttError(f"publishing to {topic!r} failed: {exc}.") from exc
        with self._pending_lock:
            self._early.discard(info.mid)
        if not info.is_published():
            raise MqttError(f"the broker did not acknowledge the message on {topic!r} within {timeout_s:g} s.")

    def flush(self, timeout_s: float = 5.0) -> bool:
        """Wait until every message published without waiting is acknowledged; True if
        all were within ``timeout_s`` seconds."""
        deadline = time.monotonic() + timeout_s
        while True:
            with self._pending_lock:
                left = len(self._pending)
            if not left:
                return True
            if time.monotonic() >= deadline:
                return False
            time.sleep(0.01)

    def publish_status(self, machine: str, status: Mapping[str, Any], *, wait: bool = True) -> None:
        """Replace the retained status of ``machine`` on ``{prefix}/{machine}/status``."""
        self.publish(self.settings.status_topic(machine), _json(status), retain=True, wait=wait)

    def clear_status(self, machine: str, *, wait: bool = True) -> None:
        """Remove the retained status (an empty retained message deletes it)."""
        self.publish(self.settings.status_topic(machine), b"", retain=True, wait=wait)

    def publish_alarm(self, machine: str, event: Mapping[str, Any], *, wait: bool = True) -> None:
        """Publish one alarm transition on ``{prefix}/{machine}/alarms`` (not retained)."""
        self.publish(self.settings.alarms_topic(machine), _json(event), wait=wait)

    def stop(self, flush_s: float = 5.0) -> None:
        """Send what is still queued (up to ``flush_s`` seconds), then disconnect."""
        if self._connected.is_set():
            self.flush(flush_s)
        self._client.disconnect()
        self._client.loop_stop()


def _json(body: Mapping[str, Any]) -> bytes:
    return json.dumps(body, separators=(",", ":"), allow_nan=False, default=str).encode("utf-8")
