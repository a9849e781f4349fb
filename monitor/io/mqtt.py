"""MQTT transport: receive readings with manual acknowledgement, publish status and alarms.

A thin layer over paho-mqtt 2.x (``CallbackAPIVersion.VERSION2``) that gives the service
at-least-once delivery with bounded memory (docs/mqtt.md is the contract):

- :class:`MessageSource` subscribes at QoS 1 with a persistent session (MQTT 5: clean start
  off and a session expiry; MQTT 3.1.1: clean session off), hands each message to one
  worker thread through a queue bounded by ``receive_maximum``, and sends the PUBACK only
  when the consumer calls :meth:`MessageSource.ack` after committing its results. At most
  ``receive_maximum`` messages are handed off and unacknowledged at once: the broker is
  asked for that (MQTT 5 Receive Maximum) and the source enforces it itself, because a
  broker may send more (Mosquitto 2.0.11 does while messages are queued); the network
  thread then waits, so a slow consumer holds back the broker, not our memory. It
  reconnects with back-off and subscribes again on every connection.
- :class:`Publisher` publishes the retained machine status and the alarm events at QoS 1,
  either waiting for the broker's acknowledgement or handing them to paho's bounded
  outbound queue (sent and resent until acknowledged) so the caller does not wait.

Exceptions::

    ValueError
     +-- MqttConfigError        a bad URL or setting (one sentence naming it)
    RuntimeError
     +-- MqttError              not connected in time, a publish not acknowledged
"""

from __future__ import annotations

import contextlib
import json
import logging
import queue
import re
import socket
import threading
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any
from urllib.parse import unquote, urlsplit

import paho.mqtt.client as paho
from paho.mqtt.enums import CallbackAPIVersion
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties
from paho.mqtt.subscribeoptions import SubscribeOptions

from monitor.config import broker_default

log = logging.getLogger(__name__)

PROTOCOLS = ("5", "3.1.1")
DEFAULT_PORTS = {"mqtt": 1883, "mqtts": 8883}
_LEVEL = re.compile(r"^[^/#+\x00]+$")


class MqttConfigError(ValueError):
    """A broker URL or MQTT setting is invalid; the message names it in one sentence."""


class MqttError(RuntimeError):
    """The broker did not answer as needed (connection, acknowledgement) in time."""


# ----------------------------------------------------------------------------- settings


@dataclass(frozen=True)
class BrokerAddress:
    """Where the broker is: ``tls`` for mqtts://; credentials only if the URL carried them."""

    tls: bool
    host: str
    port: int
    username: str | None = None
    password: str | None = None


def parse_broker_url(url: str) -> BrokerAddress:
    """Parse ``mqtt://[user[:password]@]host[:port]`` or ``mqtts://...``.

    Default ports: 1883 (mqtt), 8883 (mqtts). Raises :class:`MqttConfigError`.
    """
    if not isinstance(url, str) or not url.strip():
        raise MqttConfigError(f"broker URL must be a non-empty mqtt:// or mqtts:// URL, got {url!r}.")
    parts = urlsplit(url.strip())
    scheme = parts.scheme.lower()
    if scheme not in DEFAULT_PORTS:
        raise MqttConfigError(f"broker URL {url!r} must start with mqtt:// or mqtts://.")
    try:
        port = parts.port
    except ValueError:
        raise MqttConfigError(f"broker URL {url!r} has a port that is not a number in 1-65535.") from None
    if not parts.hostname:
        raise MqttConfigError(f"broker URL {url!r} names no host (write mqtt://HOST:PORT).")
    if parts.path not in ("", "/") or parts.query or parts.fragment:
        raise MqttConfigError(f"broker URL {url!r} must not have a path, query or fragment.")
    if port == 0:
        raise MqttConfigError(f"broker URL {url!r} has a port that is not a number in 1-65535.")
    return BrokerAddress(
        tls=scheme == "mqtts",
        host=parts.hostname,
        port=port or DEFAULT_PORTS[scheme],
        username=unquote(parts.username) if parts.username else None,
        password=unquote(parts.password) if parts.password is not None else None,
    )


@dataclass(frozen=True)
class MqttSettings:
    """How to reach the broker and how to subscribe.

    Attributes
    ----------
    url : str
        ``mqtt://host:port`` or ``mqtts://host:port`` (TLS).
    username, password : str or None
        Credentials; override any given in the URL.
    ca_file, cert_file, key_file : str or None
        TLS trust anchors (PEM) and client certificate/key; ``ca_file`` None uses the
        system's trust store. Setting any of them with an mqtt:// URL is an error.
    client_id : str
        Must be unique per process and stable across its restarts: the broker keeps the
        session (subscriptions, unacknowledged and queued messages) under this id.
    protocol : str
        ``"5"`` (default) or ``"3.1.1"``.
    session_expiry_s : int
        MQTT 5: how long the broker keeps the session while we are away, s (Mosquitto
        cuts it to its ``persistent_client_expiration`` when that is shorter).
    keepalive_s : int
        Keep-alive interval, s.
    receive_maximum : int
        Most received, unacknowledged messages held at once: announced as the MQTT 5
        Receive Maximum and enforced by :class:`MessageSource` whatever the broker sends.
        With MQTT 3.1.1 the broker's own in-flight limit (Mosquitto
        ``max_inflight_messages``) decides what it sends: keep that at or below this.

    Defaults that the service file also sets are those of the settings registry
    (:func:`monitor.config.broker_default`), so the two cannot drift apart.
    prefix : str
        Topic prefix (one or more topic levels).
    share_group : str or None
        Shared-subscription group: processes with the same group split the stream.
    reconnect_min_s, reconnect_max_s : float
        Reconnect back-off, doubling from min to max, s.
    """

    url: str = broker_default("url")
    username: str | None = None
    password: str | None = field(default=None, repr=False)
    ca_file: str | None = None
    cert_file: str | None = None
    key_file: str | None = None
    client_id: str = "whirlwatch"
    protocol: str = broker_default("protocol")
    session_expiry_s: int = broker_default("session_expiry_s")
    keepalive_s: int = broker_default("keepalive_s")
    receive_maximum: int = broker_default("receive_maximum")
    prefix: str = broker_default("topic_prefix")
    share_group: str | None = None
    reconnect_min_s: float = 1.0
    reconnect_max_s: float = broker_default("reconnect_max_s")

    def __post_init__(self) -> None:
        address = parse_broker_url(self.url)
        if self.protocol not in PROTOCOLS:
            raise MqttConfigError(f"MQTT protocol must be one of {PROTOCOLS}, got {self.protocol!r}.")
        if not isinstance(self.client_id, str) or not 1 <= len(self.client_id) <= 128:
            raise MqttConfigError(f"MQTT client id must be 1-128 characters, got {self.client_id!r}.")
        for name, low, high in (
            ("session_expiry_s", 0, 0xFFFFFFFF),
            ("keepalive_s", 1, 65535),
            ("receive_maximum", 1, 65535),
        ):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, int) or not low <= v <= high:
                raise MqttConfigError(f"MQTT {name} must be a whole number in {low}-{high}, got {v!r}.")
        if not 0 < self.reconnect_min_s <= self.reconnect_max_s:
            raise MqttConfigError(
                "MQTT reconnect_min_s must be positive and at most reconnect_max_s, got "
                f"{self.reconnect_min_s!r} and {self.reconnect_max_s!r}."
            )
        levels = self.prefix.split("/") if isinstance(self.prefix, str) else [""]
        if not all(_LEVEL.match(level) for level in levels):
            raise MqttConfigError(
                f"MQTT topic prefix must be topic levels without '+', '#' or empty levels, got {self.prefix!r}."
            )
        if self.share_group is not None and not _LEVEL.match(self.share_group):
            raise MqttConfigError(
                f"MQTT shared-subscription group must be one topic level without '+' or '#', got {self.share_group!r}."
            )
        if not address.tls and (self.ca_file or self.cert_file or self.key_file):
            raise MqttConfigError(
                f"TLS files are set but the broker URL {self.url!r} is not mqtts://."
            )
        if bool(self.cert_file) != bool(self.key_file):
            raise MqttConfigError("MQTT TLS client certificate needs both cert_file and key_file.")

    @property
    def address(self) -> BrokerAddress:
        return parse_broker_url(self.url)

    def subscriptions(self) -> tuple[str, ...]:
        """The topic filters the service subscribes to (shared when a group is set)."""
        filters = (f"{self.prefix}/+/+/waveform", f"{self.prefix}/+/speed")
        if self.share_group:
            return tuple(f"$share/{self.share_group}/{f}" for f in filters)
        return filters

    def status_topic(self, machine: str) -> str:
        return f"{self.prefix}/{machine}/status"

    def alarms_topic(self, machine: str) -> str:
        return f"{self.prefix}/{machine}/alarms"


def _make_client(
    settings: MqttSettings, client_id: str, *, manual_ack: bool, persistent: bool
) -> paho.Client:
    v5 = settings.protocol == "5"
    client = paho.Client(
        callback_api_version=CallbackAPIVersion.VERSION2,
        client_id=client_id,
        protocol=paho.MQTTv5 if v5 else paho.MQTTv311,
        # MQTT 3.1.1 sets the session at construction; MQTT 5 at connect (clean_start).
        clean_session=None if v5 else not persistent,
        manual_ack=manual_ack,
    )
    address = settings.address
    username = settings.username if settings.username is not None else address.username
    password = settings.password if settings.password is not None else address.password
    if username is not None:
        client.username_pw_set(username, password)
    if address.tls:
        client.tls_set(ca_certs=settings.ca_file, certfile=settings.cert_file, keyfile=settings.key_file)
    client.reconnect_delay_set(settings.reconnect_min_s, settings.reconnect_max_s)  # type: ignore[arg-type]
    client.on_socket_open = _no_delay
    return client


def _no_delay(_c: paho.Client, _u: Any, sock: Any) -> None:
    """paho leaves Nagle's algorithm on: a small packet (a PUBACK, the tail of a payload)
    then waits for the peer's delayed ACK, some 40 ms on Linux, on every message."""
    with contextlib.suppress(OSError, AttributeError):  # not a TCP socket
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)


def _connect_async(client: paho.Client, settings: MqttSettings, *, persistent: bool) -> None:
    address = settings.address
    if settings.protocol == "5":
        props = Properties(PacketTypes.CONNECT)
        if persistent:
            props.SessionExpiryInterval = settings.session_expiry_s
        props.ReceiveMaximum = settings.receive_maximum
        client.connect_async(
            address.host,
            address.port,
            keepalive=settings.keepalive_s,
            # Without clean_start=False every start would wipe the queued backlog.
            clean_start=not persistent,
            properties=props,
        )
    else:
        client.connect_async(address.host, address.port, keepalive=settings.keepalive_s)


# ----------------------------------------------------------------------------- receiving


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
        self._client = _make_client(
            settings, settings.client_id, manual_ack=True, persistent=True
        )
        self._client.on_connect = self._on_connect
        self._client.on_disconnect = self._on_disconnect
        self._client.on_subscribe = self._on_subscribe
        self._client.on_message = self._on_message

    # -- paho network thread

    def _on_connect(self, client: paho.Client, _u: Any, flags: Any, reason: Any, _p: Any) -> None:
        if reason.is_failure:
            self.last_error = f"the broker refused the connection: {reason}"
            log.warning("mqtt connect refused: %s", reason)
            return
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
            "mqtt connected to %s (session present: %s)", self.settings.url, flags.session_present
        )
        # A persistent session keeps the subscription, but a session that expired (or a
        # broker that lost its state) does not: subscribe on every connection.
        if self.settings.protocol == "5":
            client.subscribe([(t, SubscribeOptions(qos=1)) for t in self.settings.subscriptions()])
        else:
            client.subscribe([(t, 1) for t in self.settings.subscriptions()])

    def _on_subscribe(self, _c: paho.Client, _u: Any, _mid: int, reasons: Any, _p: Any) -> None:
        failed = [str(r) for r in reasons if r.is_failure]
        if failed:
            self.last_error = f"the broker refused the subscription: {', '.join(failed)}"
            log.error("mqtt subscribe refused: %s", failed)
        else:
            self._subscribed.set()

    def _on_disconnect(self, _c: paho.Client, _u: Any, _f: Any, reason: Any, _p: Any) -> None:
        self._subscribed.clear()
        if not self._stopping.is_set():
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
        _connect_async(self._client, self.settings, persistent=True)
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
        _connect_async(self._client, self.settings, persistent=True)
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


# ----------------------------------------------------------------------------- publishing


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
        self._client = _make_client(
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
        if not reason.is_failure:
            self._connected.set()

    def _on_disconnect(self, _c: paho.Client, _u: Any, _f: Any, _r: Any, _p: Any) -> None:
        self._connected.clear()

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
        _connect_async(self._client, self.settings, persistent=False)
        self._client.loop_start()
        if not self._connected.wait(timeout_s):
            raise MqttError(f"no connection to the broker at {self.settings.url} within {timeout_s:g} s.")

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


def wait_until(predicate: Callable[[], bool], timeout_s: float, poll_s: float = 0.01) -> bool:
    """Poll ``predicate`` until it is true or ``timeout_s`` seconds pass; return its last value."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if predicate():
            return True
        time.sleep(poll_s)
    return bool(predicate())
