"""Running the service as a process until SIGTERM or SIGINT (``whirlwatch run``)."""

from __future__ import annotations

import signal
import threading
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from monitor.service.service import Service


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
