"""Running the service as a process: its broker settings from the service file, and a
run until SIGTERM or SIGINT (``whirlwatch run``).
"""

from __future__ import annotations

import signal
import socket
import threading
from typing import TYPE_CHECKING

from monitor.config import Settings
from monitor.io.mqtt import MqttSettings

if TYPE_CHECKING:
    from monitor.service.service import Service


def default_client_id(group: str) -> str:
    """A client id stable across restarts of this process on this host."""
    return f"whirlwatch-{socket.gethostname()}-{group or 'solo'}"[:128]


def mqtt_settings(settings: Settings, client_id: str | None = None) -> MqttSettings:
    """The transport settings of the service file's ``[broker]`` table."""
    b = settings.broker
    return MqttSettings(
        url=b.url,
        username=b.username or None,
        password=b.password or None,
        ca_file=b.ca_file or None,
        cert_file=b.cert_file or None,
        key_file=b.key_file or None,
        client_id=client_id or b.client_id or default_client_id(b.shared_group),
        protocol=b.protocol,
        session_expiry_s=b.session_expiry_s,
        keepalive_s=b.keepalive_s,
        receive_maximum=b.receive_maximum,
        prefix=b.topic_prefix,
        share_group=b.shared_group or None,
        reconnect_max_s=max(1.0, b.reconnect_max_s),
    )


def run_service(service: Service, *, install_signals: bool = True) -> None:
    """Start ``service`` and block until SIGTERM/SIGINT (or ``service.stop``); then stop
    it (in-flight work is finished, committed and acknowledged first)."""
    stop = threading.Event()
    if install_signals:
        for sig in (signal.SIGTERM, signal.SIGINT):
            signal.signal(sig, lambda *_: stop.set())
    service.start()
    try:
        while not stop.wait(0.5) and not service.wait(0):
            pass
    finally:
        service.stop()
