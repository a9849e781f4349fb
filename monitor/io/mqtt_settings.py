"""How the transport reaches the broker: :class:`MqttSettings`, built from the service file
by :meth:`MqttSettings.from_settings`, and the paho-mqtt 2.x client made from them.

:class:`monitor.io.mqtt_source.MessageSource` (inbound) and
:class:`monitor.io.mqtt_publisher.Publisher` (outbound) both connect through
:func:`make_client` and :func:`connect_async`; docs/mqtt.md is the contract.

Exceptions::

    ValueError
     +-- MqttConfigError        a bad URL or setting (monitor.io.mqtt_names)
    RuntimeError
     +-- MqttError              not connected in time, a publish not acknowledged
"""

from __future__ import annotations

import contextlib
import socket
from dataclasses import dataclass, field
from typing import Any

import paho.mqtt.client as paho
from paho.mqtt.enums import CallbackAPIVersion
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from monitor.io.mqtt_failures import ReportingClient
from monitor.io.mqtt_names import (
    BrokerAddress,
    MqttConfigError,
    is_topic_level,
    is_topic_prefix,
    parse_broker_url,
)
from monitor.redact import redact
from monitor.settings import BY_NAME, BrokerSettings, broker_default

#: The MQTT versions spoken: the choices of setting ``broker.protocol``.
PROTOCOLS: tuple[str, ...] = tuple(BY_NAME["broker.protocol"].choices or ())

#: Whole-number settings the transport checks, by the registry's bounds of the same setting.
_WHOLE = ("session_expiry_s", "keepalive_s", "receive_maximum")


class MqttError(RuntimeError):
    """The broker did not answer as needed (connection, acknowledgement) in time."""


def default_client_id(group: str) -> str:
    """A client id stable across restarts of this process on this host (``group`` is the
    shared-subscription group, empty for none)."""
    return f"whirlwatch-{socket.gethostname()}-{group or 'solo'}"[:128]


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
        Receive Maximum and enforced by :class:`~monitor.io.mqtt_source.MessageSource`
        whatever the broker sends. With MQTT 3.1.1 the broker's own in-flight limit
        (Mosquitto ``max_inflight_messages``) decides what it sends: keep that at or
        below this.
    prefix : str
        Topic prefix (one or more topic levels).
    share_group : str or None
        Shared-subscription group: processes with the same group split the stream.
    reconnect_min_s, reconnect_max_s : float
        Reconnect back-off, doubling from min to max, s.

    Defaults, and the bounds of the whole-number settings, that the service file also
    sets are those of the settings registry (:mod:`monitor.settings`), so the two cannot
    drift apart.
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

    @classmethod
    def from_settings(cls, broker: BrokerSettings, *, client_id: str | None = None) -> MqttSettings:
        """The transport settings of the service file's ``[broker]`` table.

        ``client_id`` (when given) wins over the file's; with neither, one is derived from
        the host name and the shared-subscription group (:func:`default_client_id`).
        Empty texts of the file mean "none".
        """
        return cls(
            url=broker.url,
            username=broker.username or None,
            password=broker.password or None,
            ca_file=broker.ca_file or None,
            cert_file=broker.cert_file or None,
            key_file=broker.key_file or None,
            client_id=client_id or broker.client_id or default_client_id(broker.shared_group),
            protocol=broker.protocol,
            session_expiry_s=broker.session_expiry_s,
            keepalive_s=broker.keepalive_s,
            receive_maximum=broker.receive_maximum,
            prefix=broker.topic_prefix,
            share_group=broker.shared_group or None,
            # The back-off starts at reconnect_min_s (1 s) and must not end below it.
            reconnect_max_s=max(1.0, broker.reconnect_max_s),
        )

    def __post_init__(self) -> None:
        address = parse_broker_url(self.url)
        if self.protocol not in PROTOCOLS:
            raise MqttConfigError(f"MQTT protocol must be one of {PROTOCOLS}, got {self.protocol!r}.")
        if not isinstance(self.client_id, str) or not 1 <= len(self.client_id) <= 128:
            raise MqttConfigError(f"MQTT client id must be 1-128 characters, got {self.client_id!r}.")
        for name in _WHOLE:
            setting = BY_NAME[f"broker.{name}"]
            low, high = int(setting.minimum or 0), int(setting.maximum or 0)
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, int) or not low <= v <= high:
                raise MqttConfigError(f"MQTT {name} must be a whole number in {low}-{high}, got {v!r}.")
        if not 0 < self.reconnect_min_s <= self.reconnect_max_s:
            raise MqttConfigError(
                "MQTT reconnect_min_s must be positive and at most reconnect_max_s, got "
                f"{self.reconnect_min_s!r} and {self.reconnect_max_s!r}."
            )
        if not is_topic_prefix(self.prefix):
            raise MqttConfigError(
                f"MQTT topic prefix must be topic levels without '+', '#' or empty levels, got {self.prefix!r}."
            )
        if self.share_group is not None and not is_topic_level(self.share_group):
            raise MqttConfigError(
                f"MQTT shared-subscription group must be one topic level without '+' or '#', got {self.share_group!r}."
            )
        if not address.tls and (self.ca_file or self.cert_file or self.key_file):
            raise MqttConfigError(
                f"TLS files are set but the broker URL {self.shown_url!r} is not mqtts://."
            )
        if bool(self.cert_file) != bool(self.key_file):
            raise MqttConfigError("MQTT TLS client certificate needs both cert_file and key_file.")

    @property
    def shown_url(self) -> str:
        """The broker URL as logs and messages show it: without its password."""
        return redact(self.url)

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


# ----------------------------------------------------------------------------- the client


def _check_readable(settings: MqttSettings) -> None:
    """MqttConfigError naming the setting and the path of a TLS file that cannot be read."""
    for name, path in (("ca_file", settings.ca_file), ("cert_file", settings.cert_file),
                       ("key_file", settings.key_file)):
        if not path:
            continue
        try:
            with open(path, "rb"):
                pass
        except OSError as exc:
            why = (exc.strerror or str(exc)).lower()
            raise MqttConfigError(f"broker.{name} {path!r} cannot be read: {why}.") from None


def make_client(
    settings: MqttSettings, client_id: str, *, manual_ack: bool, persistent: bool
) -> ReportingClient:
    """A paho client for ``settings`` under ``client_id`` (empty: the broker or paho picks
    one), with credentials, TLS, the reconnect back-off and Nagle's algorithm off; it says
    why each connection attempt fails (:class:`~monitor.io.mqtt_failures.ReportingClient`).
    MqttConfigError naming the setting and the path of a TLS file that cannot be read, or
    the files when they hold no usable certificate or key.

    ``persistent`` keeps the session across connections (MQTT 3.1.1 sets that here;
    MQTT 5 at connect, :func:`connect_async`)."""
    v5 = settings.protocol == "5"
    client = ReportingClient(
        shown_url=settings.shown_url,
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
        _check_readable(settings)
        try:
            client.tls_set(ca_certs=settings.ca_file, certfile=settings.cert_file, keyfile=settings.key_file)
        except (OSError, ValueError) as exc:  # ssl.SSLError: a file that is no PEM certificate or key
            raise MqttConfigError(
                f"the TLS files broker.ca_file, broker.cert_file, broker.key_file could not be loaded: {exc}."
            ) from None
    # paho's stub types the delays as int; the back-off takes fractions of a second.
    client.reconnect_delay_set(settings.reconnect_min_s, settings.reconnect_max_s)  # type: ignore[arg-type]
    client.on_socket_open = no_delay
    return client


def no_delay(_c: paho.Client, _u: Any, sock: Any) -> None:
    """paho leaves Nagle's algorithm on: a small packet (a PUBACK, the tail of a payload)
    then waits for the peer's delayed ACK, some 40 ms on Linux, on every message."""
    with contextlib.suppress(OSError, AttributeError):  # not a TCP socket
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)


def connect_async(client: paho.Client, settings: MqttSettings, *, persistent: bool) -> None:
    """Start connecting ``client`` (see :func:`make_client`); MQTT 5 announces the
    Receive Maximum and, when ``persistent``, the session expiry."""
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
