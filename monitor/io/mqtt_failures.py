"""Why a connection to the broker failed, said on every attempt and kept for the final error.

A connection can fail in three places, and each has its own words:

- before MQTT: the TCP connection or the TLS handshake (no broker listening, an unknown
  host, a certificate the client does not trust or that names another host, TLS spoken to
  a plain listener). paho raises the socket's error inside its network loop and retries;
  :class:`ReportingClient` catches it on the way and says what it was.
- the broker's answer: a CONNACK with a failure reason code (MQTT 5.0 section 3.2.2.2,
  e.g. 0x86 Bad User Name or Password, 0x87 Not authorized; MQTT 3.1.1 section 3.2.2.3
  return codes, which paho maps to the same reason names).
- the broker closing the connection before it answered the CONNECT, which is what a TLS
  listener does to a plain ``mqtt://`` connection.

Each failure is logged (WARNING, the broker URL without its password) and kept as
:attr:`ReportingClient.failure`, which the "no connection ... within N s" errors end with.
"""

from __future__ import annotations

import logging
import socket
import ssl
from collections.abc import Callable
from typing import Any

import paho.mqtt.client as paho

from monitor.redact import redact

log = logging.getLogger(__name__)


def describe_os_error(exc: OSError, host: str, port: int, *, tls: bool) -> str:
    """What a failed TCP connection or TLS handshake to ``host:port`` means, as a phrase."""
    if isinstance(exc, ssl.SSLCertVerificationError):
        return f"TLS: the broker's certificate was not accepted ({exc.verify_message})"
    if isinstance(exc, ssl.SSLError) or (tls and isinstance(exc, ConnectionResetError | BrokenPipeError)):
        hint = "; is the listener plain MQTT? then use mqtt://" if tls else ""
        why = getattr(exc, "reason", None) or exc.strerror or exc
        return f"TLS handshake failed ({why}){hint}"
    if isinstance(exc, ConnectionRefusedError):
        return f"connection refused by {host}:{port} (no broker listening there)"
    if isinstance(exc, socket.gaierror):
        return f"cannot resolve the host name {host!r} ({exc.strerror})"
    if isinstance(exc, TimeoutError | socket.timeout):
        return f"no answer from {host}:{port}"
    return f"cannot connect to {host}:{port} ({exc.strerror or exc})"


def describe_refusal(reason: Any) -> str:
    """A CONNACK's failure reason code (paho's ``ReasonCode``) as a phrase with its number."""
    value = getattr(reason, "value", None)
    code = f" (reason code 0x{value:02X})" if isinstance(value, int) else ""
    return f"the broker refused the connection: {reason}{code}"


class ReportingClient(paho.Client):
    """A paho client that says why each connection attempt failed.

    ``shown_url`` is the broker URL as messages show it (without its password). The
    callers' ``on_connect`` and ``on_disconnect`` hand the broker's answers to
    :meth:`connack` and :meth:`closed`; failures of the socket or the TLS handshake are
    caught in :meth:`reconnect`, which paho's loop calls for every attempt.
    """

    def __init__(self, *args: Any, shown_url: str, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.shown_url = shown_url
        #: Why the latest attempt failed, or None (never failed, or connected since).
        self.failure: str | None = None
        #: Called with the phrase of every failed attempt (after it is logged), if set.
        self.on_failure: Callable[[str], None] | None = None
        self._answered = False

    def failed(self, why: str) -> None:
        """Record and log one failed attempt."""
        self.failure = redact(why)
        log.warning("mqtt connection to %s failed: %s", self.shown_url, self.failure)
        if self.on_failure is not None:
            self.on_failure(self.failure)

    def reconnect(self) -> paho.MQTTErrorCode:
        self._answered = False
        try:
            return super().reconnect()
        except OSError as exc:
            self.failed(describe_os_error(exc, self.host, self.port, tls=self._ssl))
            raise  # paho's loop counts it and retries after the back-off

    def _ssl_wrap_socket(self, tcp_sock: socket.socket) -> ssl.SSLSocket:
        """paho's TLS handshake, closing the socket when it fails: paho 2.2 leaves it open
        until the garbage collector finds it, a file descriptor per failed attempt."""
        context = self._ssl_context
        if context is None or not context.check_hostname:  # not the context make_client sets
            return super()._ssl_wrap_socket(tcp_sock)
        sock = context.wrap_socket(tcp_sock, server_hostname=self.host, do_handshake_on_connect=False)
        try:
            sock.settimeout(self._connect_timeout)
            sock.do_handshake()  # checks the chain and the host name (check_hostname)
        except BaseException:
            sock.close()
            raise
        return sock

    def connack(self, reason: Any) -> bool:
        """The broker answered the CONNECT with ``reason``; True when it accepted."""
        self._answered = True
        if reason.is_failure:
            self.failed(describe_refusal(reason))
            return False
        self.failure = None
        return True

    def closed(self, reason: Any) -> bool:
        """The connection ended with ``reason``; True when that was a failed attempt (the
        broker had not answered the CONNECT yet), False for a connection lost."""
        if self._answered:
            return False
        hint = "" if self._ssl else "; a TLS listener does that to a plain mqtt:// connection"
        self.failed(f"the broker closed the connection before answering ({reason}){hint}")
        return True
