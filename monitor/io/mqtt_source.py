"""Inbound readings from the broker with manual acknowledgement and bounded memory.

:class:`MessageSource` gives the service at-least-once delivery (docs/mqtt.md is the
contract): it subscribes at QoS 1 with a persistent session (MQTT 5: clean start off and a
session expiry; MQTT 3.1.1: clean session off), hands each message to one worker thread
through a queue bounded by ``receive_maximum``, and sends the PUBACK only when the consumer
calls :meth:`MessageSource.ack` after committing its results. At most ``receive_maximum``
messages are handed off and unacknowledged at once: the broker is asked for that (MQTT 5
Receive Maximum) and the source enforces it itself, because a broker may send more
(Mosquitto 2.0.11 does while messages are queued); the network thread then waits, so a
slow consumer holds back the broker, not our memory. It reconnects with back-off and
subscribes again on every connection.
"""

from __future__ import annotations

import logging
import queue
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import paho.mqtt.client as paho
from paho.mqtt.subscribeoptions import SubscribeOptions

from monitor.io.mqtt_names import MqttConfigError
from monitor.io.mqtt_settings import MqttError, MqttSettings, connect_async, make_client

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class InboundMessage:
    """One message as delivered; pass it back to :meth:`MessageSource.ack` when committed.

    ``dup`` is set when the broker redelivers a message it sent before (after a reconnect).
    ``connection`` numbers the connection it arrived on.
    """

    topic: str
    payload: bytes
    mid: int
    qos: int
    dup: bool
    retain: bool = False
    connection: int = 0


@dataclass
class SourceStats:
    """Counters of a :class:`MessageSource` (read them, do not write them)."""

    received: int = 0
    acked: int = 0
    handler_errors: int = 0
    stale_dropped: int = 0
    stale_not_acked: int = 0
    connects: int = 0
    queue_high_water: int = 0
    #: Messages handed to the worker and not yet acknowledged or given up (at most
    #: ``receive_maximum``), and the most there ever were at once.
    in_flight: int = 0
    in_flight_high_water: int = 0


class MessageSource:
    """Inbound readings with manual acknowledgement and a bounded hand-off queue.

    ``start(handler)`` connects (retrying until :meth:`stop`) and calls ``handler(message)``
    on one worker thread for each message, in arrival order. The handler, or whoever it
    passes the message to, calls ``ack(message)`` once the results are committed. A message
    never acknowledged (handler error, crash) comes back after the next reconnect with
    ``dup`` set. An acknowledgement for a message of an earlier connection is not sent: its
    packet id may now belong to another message; the broker redelivers it instead.
    """

    def __init__(self, settings: MqttSettings) -> None:
        self.settings = settings
        self.stats = SourceStats()
        self._queue: queue.Queue[InboundMessage] = queue.Queue(maxsize=settings.receive_maximum)
        self._lock = threading.Lock()
        # Messages handed off and not yet released (acknowledged, dropped as stale, or
        # given up after a handler error), by id(): each holds one of receive_maximum slots.
        self._held: dict[int, InboundMessage] = {}
        self._room = threading.Condition(self._lock)
        self._connection = 0
        self._stopping = threading.Event()
        self._subscribed = threading.Event()
        self._worker: threading.Thread | None = None
        self._handler: Callable[[InboundMessage], None] | None = None
        self._batch_handler: Callable[[list[InboundMessage]], None] | None = None
        self._max_batch = 1
        self.last_error: str | None = None
        # Monotonic time since when messages have waited without one being acknowledged
        # (None while none waits): how long the consumer has made no progress.
        self._waiting_since: float | None = None
        self.disconnected_at: float | None = None  # epoch s of the last connection loss
        self._client = make_client(
            settings, settings.client_id, manual_ack=True, persistent=True
        )
        self._client.on_connect = self._on_connect
        self._client.on_disconnect = self._on_disconnect
        self._client.on_subscribe = self._on_subscribe
        self._client.on_message = self._on_message
        self._client.on_failure = self._on_failure

    # -- paho network thread

    def _on_connect(self, client: paho.Client, _u: Any, flags: Any, reason: Any, _p: Any) -> None:
        if not self._client.connack(reason):
            return  # _on_failure has the reason
        with self._lock:
            self._connection += 1
            self.stats.connects += 1
            self.last_error = None
            self.disconnected_at = None
        if flags.session_present:
            # The broker will resend what we had not acknowledged: the queued copies of the
            # old connection would only be handled twice.
            while True:
                try:
                    stale = self._queue.get_nowait()
                except queue.Empty:
                    break
                self.stats.stale_dropped += 1
                self._release(stale)
        log.info(
            "mqtt connected to %s (session present: %s)", self.settings.shown_url, flags.session_present
        )
        # A persistent session keeps the subscription, but a session that expired (or a
        # broker that lost its state) does not: subscribe on every connection.
        if self.settings.protocol == "5":
            client.subscribe([(t, SubscribeOptions(qos=1)) for t in self.settings.subscriptions()])
        else:
            client.subscribe([(t, 1) for t in self.settings.subscriptions()])

    def _on_failure(self, why: str) -> None:
        with self._lock:
            self.last_error = why

    def _on_subscribe(self, _c: paho.Client, _u: Any, _mid: int, reasons: Any, _p: Any) -> None:
        failed = [str(r) for r in reasons if r.is_failure]
        if failed:
            self.last_error = f"the broker refused the subscription: {', '.join(failed)}"
            log.error("mqtt subscribe refused: %s", failed)
        else:
            self._subscribed.set()

    def _on_disconnect(self, _c: paho.Client, _u: Any, _f: Any, reason: Any, _p: Any) -> None:
        self._subscribed.clear()
        if not self._client.closed(reason) and not self._stopping.is_set():
            with self._lock:
                self.disconnected_at = time.time()
                self.last_error = f"connection lost: {reason}"
            log.warning("mqtt connection lost (%s); reconnecting", reason)

    def _on_message(self, _c: paho.Client, _u: Any, msg: paho.MQTTMessage) -> None:
        if self._stopping.is_set():
            return  # left unacknowledged: redelivered to the next session
        item = InboundMessage(
            topic=msg.topic,
            payload=bytes(msg.payload),
            mid=msg.mid,
            qos=msg.qos,
            dup=bool(msg.dup),
            retain=bool(msg.retain),
            connection=self._connection,
        )
        # A slot per unacknowledged message, whatever the broker sends: Mosquitto 2.0.11
        # was measured to send a whole new Receive Maximum of queued messages after every
        # PUBACK, and a 3.1.1 broker applies only its own limit. Waiting here holds this one
        # message on the network thread and leaves the rest in TCP and at the broker.
        with self._room:
            while len(self._held) >= self.settings.receive_maximum:
                if self._stopping.is_set():
                    return  # left unacknowledged: redelivered to the next session
                self._room.wait(0.1)
            self._held[id(item)] = item
            self.stats.received += 1
            if self._waiting_since is None:
                self._waiting_since = time.monotonic()
            self.stats.in_flight = len(self._held)
            self.stats.in_flight_high_water = max(self.stats.in_flight_high_water, self.stats.in_flight)
        # The slots guarantee room; the loop only guards a stop.
        while not self._stopping.is_set():
            try:
                self._queue.put(item, timeout=0.1)
                break
            except queue.Full:
                continue
        size = self._queue.qsize()
        if size > self.stats.queue_high_water:
            self.stats.queue_high_water = size

    # -- worker thread

    def _work(self) -> None:
        assert self._handler is not None or self._batch_handler is not None
        while True:
            try:
                item = self._queue.get(timeout=0.05)
            except queue.Empty:
                if self._stopping.is_set():
                    return
                continue
            if self._batch_handler is None:
                try:
                    self._handler(item)  # type: ignore[misc]
                except Exception:
                    self.stats.handler_errors += 1
                    log.exception("handler failed on %s; left unacknowledged", item.topic)
                    self._release(item)
                continue
            # Group commit: take what is already waiting, never wait for more, so a lone
            # message is handled at once and a backlog is handled max_batch at a time.
            batch = [item]
            while len(batch) < self._max_batch:
                try:
                    batch.append(self._queue.get_nowait())
                except queue.Empty:
                    break
            try:
                self._batch_handler(batch)
            except Exception:
                self.stats.handler_errors += 1
                log.exception("handler failed on %d messages; left unacknowledged", len(batch))
                for failed in batch:
                    self._release(failed)

    # -- public

    def start(self, handler: Callable[[InboundMessage], None]) -> None:
        """Connect (in the background, retrying) and hand every message to ``handler``."""
        if self._worker is not None:
            raise MqttError("this MessageSource was already started.")
        self._handler = handler
        self._worker = threading.Thread(target=self._work, name="mqtt-worker", daemon=True)
        self._worker.start()
        connect_async(self._client, self.settings, persistent=True)
        self._client.loop_start()

    def start_batches(
        self, handler: Callable[[list[InboundMessage]], None], max_batch: int = 32
    ) -> None:
        """Like :meth:`start`, but ``handler`` gets the messages already waiting in the
        hand-off queue together (at most ``max_batch``, at least one, in arrival order), so
        the consumer can commit them in one transaction and then acknowledge them all."""
        if isinstance(max_batch, bool) or not isinstance(max_batch, int) or max_batch < 1:
            raise MqttConfigError(f"max_batch must be a whole number >= 1, got {max_batch!r}.")
        if self._worker is not None:
            raise MqttError("this MessageSource was already started.")
        self._batch_handler = handler
        self._max_batch = max_batch
        self._worker = threading.Thread(target=self._work, name="mqtt-worker", daemon=True)
        self._worker.start()
        connect_async(self._client, self.settings, persistent=True)
        self._client.loop_start()

    def wait_subscribed(self, timeout_s: float = 10.0) -> bool:
        """True once connected and subscribed (False after ``timeout_s`` seconds)."""
        return self._subscribed.wait(timeout_s)

    @property
    def connected(self) -> bool:
        return self._client.is_connected()

    def waiting_s(self, now_m: float | None = None) -> float:
        """Seconds messages have waited without one being acknowledged (0 while none
        waits): received-but-unacknowledged messages that make no progress."""
        with self._lock:
            since = self._waiting_since
        if since is None:
            return 0.0
        return max(0.0, (time.monotonic() if now_m is None else now_m) - since)

    @property
    def queue_size(self) -> int:
        """Messages handed off but not yet taken by the worker."""
        return self._queue.qsize()

    def ack(self, message: InboundMessage) -> bool:
        """Acknowledge ``message`` (after its results are committed); False if not sent.

        Not sent when the message arrived on an earlier connection: the broker then
        redelivers it, and the idempotent store makes the second handling a no-op.
        """
        with self._lock:
            stale = message.connection != self._connection
            if stale:
                self.stats.stale_not_acked += 1
            else:
                self.stats.acked += 1
        try:
            if stale or message.qos == 0:
                return False
            rc = self._client.ack(message.mid, message.qos)
            return rc == paho.MQTT_ERR_SUCCESS
        finally:
            self._release(message)  # after the PUBACK is queued, so the next one follows it

    def _release(self, message: InboundMessage) -> None:
        """Free the slot ``message`` holds (once; later calls do nothing)."""
        with self._room:
            if self._held.pop(id(message), None) is not None:
                self.stats.in_flight = len(self._held)
                # Progress: the wait restarts for the messages still held, or ends.
                self._waiting_since = time.monotonic() if self._held else None
                self._room.notify()

    def stop(self, timeout_s: float = 10.0) -> None:
        """Stop taking messages, let the worker finish those handed off, then disconnect.

        Messages that arrive after this call are left unacknowledged for the next session.
        """
        self._stopping.set()
        if self._worker is not None:
            self._worker.join(timeout_s)
        self._client.disconnect()
        self._client.loop_stop()
