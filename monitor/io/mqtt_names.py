"""Broker URLs and topic names: the syntax both the service file and the transport check.

:func:`parse_broker_url` reads ``mqtt://[user[:password]@]host[:port]`` or ``mqtts://...``;
:func:`is_topic_prefix` and :func:`is_topic_level` say whether a text can be the topic
prefix or a shared-subscription group. The settings registry (monitor/settings.py) and
:class:`monitor.io.mqtt_settings.MqttSettings` both call these, so a service file that
loads is one the transport accepts.

References: RFC 3986 (URL syntax); OASIS MQTT Version 5.0 (2019), 4.7 Topic Names and
Topic Filters (``/`` separates levels, ``+`` and ``#`` are wildcards, no U+0000) and
4.8.2 Shared Subscriptions (``$share/{ShareName}/{filter}``); IANA service names
``mqtt`` (1883) and ``secure-mqtt`` (8883).

Exceptions::

    ValueError
     +-- MqttConfigError        a bad URL or setting (one sentence naming it)
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from urllib.parse import unquote, urlsplit

from monitor.redact import redact

DEFAULT_PORTS = {"mqtt": 1883, "mqtts": 8883}
_LEVEL = re.compile(r"[^/#+\x00]+")


class MqttConfigError(ValueError):
    """A broker URL or MQTT setting is invalid; the message names it in one sentence."""


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
    # Errors show the URL without its password (monitor.redact).
    shown = repr(redact(url)) if isinstance(url, str) else repr(url)
    if not isinstance(url, str) or not url.strip():
        raise MqttConfigError(f"broker URL must be a non-empty mqtt:// or mqtts:// URL, got {shown}.")
    parts = urlsplit(url.strip())
    scheme = parts.scheme.lower()
    if scheme not in DEFAULT_PORTS:
        raise MqttConfigError(f"broker URL {shown} must start with mqtt:// or mqtts://.")
    try:
        port = parts.port
    except ValueError:
        raise MqttConfigError(f"broker URL {shown} has a port that is not a number in 1-65535.") from None
    if not parts.hostname:
        raise MqttConfigError(f"broker URL {shown} names no host (write mqtt://HOST:PORT).")
    if parts.path not in ("", "/") or parts.query or parts.fragment:
        raise MqttConfigError(f"broker URL {shown} must not have a path, query or fragment.")
    if port == 0:
        raise MqttConfigError(f"broker URL {shown} has a port that is not a number in 1-65535.")
    return BrokerAddress(
        tls=scheme == "mqtts",
        host=parts.hostname,
        port=port or DEFAULT_PORTS[scheme],
        username=unquote(parts.username) if parts.username else None,
        password=unquote(parts.password) if parts.password is not None else None,
    )


def is_topic_level(text: object) -> bool:
    """True if ``text`` is one non-empty topic level without ``/``, ``+``, ``#`` or U+0000."""
    return isinstance(text, str) and _LEVEL.fullmatch(text) is not None


def is_topic_prefix(text: object) -> bool:
    """True if ``text`` is one or more topic levels (``site/whirlwatch``): no wildcard, no
    empty level (so no leading, trailing or doubled ``/``)."""
    return isinstance(text, str) and all(is_topic_level(level) for level in text.split("/"))
