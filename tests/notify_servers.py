"""Real notification targets on loopback for the notification tests.

- :class:`HookReceiver`: an HTTP server (``http.server`` in a thread) that keeps every
  request (headers, raw body, arrival time) and answers with the statuses it is given;
- :func:`hanging_port`: a listening socket that never answers (a target that is up but
  dead: a client waits for its timeout);
- :func:`closed_port`: a loopback port nothing listens on (connection refused);
- :class:`MailReceiver`: an SMTP server (aiosmtpd) that requires STARTTLS with a
  certificate from tests/tls_files.py and AUTH LOGIN, and keeps every message delivered.
"""

from __future__ import annotations

import socket
import ssl
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from email import message_from_bytes
from email.message import Message
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any

from aiosmtpd.controller import Controller
from aiosmtpd.smtp import AuthResult, LoginPassword
from tls_files import TlsFiles


@dataclass(frozen=True)
class HookRequest:
    path: str
    headers: dict[str, str]
    body: bytes
    at: float  # time.monotonic() on arrival


class HookReceiver:
    """An HTTP server on 127.0.0.1; the n-th request is answered with ``statuses[n]``
    (the last one repeats; default 200)."""

    def __init__(self, statuses: tuple[int, ...] = (200,)) -> None:
        self.requests: list[HookRequest] = []
        self._lock = threading.Lock()
        receiver = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:  # noqa: N802 (http.server's name)
                body = self.rfile.read(int(self.headers.get("Content-Length") or 0))
                with receiver._lock:
                    receiver.requests.append(HookRequest(self.path, dict(self.headers.items()), body,
                                                         time.monotonic()))
                    n = len(receiver.requests)
                code = statuses[min(n, len(statuses)) - 1]
                self.send_response(code)
                self.send_header("Content-Length", "0")
                self.end_headers()

            def log_message(self, *_a: Any) -> None:
                pass

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.url = f"http://127.0.0.1:{self.server.server_address[1]}/hooks/alarms"
        self._thread = threading.Thread(target=self.server.serve_forever, daemon=True)
        self._thread.start()

    def received(self) -> list[HookRequest]:
        with self._lock:
            return list(self.requests)

    def close(self) -> None:
        self.server.shutdown()
        self.server.server_close()


@contextmanager
def hanging_port() -> Iterator[int]:
    """A port whose connections are accepted by the kernel but never answered."""
    sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    sock.bind(("127.0.0.1", 0))
    sock.listen(64)
    try:
        yield sock.getsockname()[1]
    finally:
        sock.close()


def closed_port() -> int:
    """A loopback port nothing listens on (bound, then released)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


class _Keep:
    """aiosmtpd handler: keeps each message's envelope and parsed content."""

    def __init__(self) -> None:
        self.messages: list[tuple[str, list[str], Message]] = []

    async def handle_DATA(self, server: Any, session: Any, envelope: Any) -> str:  # noqa: N802 (aiosmtpd's name)
        self.messages.append((envelope.mail_from, list(envelope.rcpt_tos), message_from_bytes(envelope.content)))
        return "250 Message accepted for delivery"


class MailReceiver:
    """An SMTP server on 127.0.0.1 that requires STARTTLS (RFC 3207) before anything and
    accepts only AUTH LOGIN (RFC 4954) as ``user``/``password``; ``logins`` keeps each
    (mechanism, user, whether the password was right, whether TLS was on)."""

    def __init__(self, tls: TlsFiles, user: str, password: str) -> None:
        context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
        context.load_cert_chain(str(tls.cert), str(tls.key))
        self.handler = _Keep()
        self.logins: list[tuple[str, str, bool, bool]] = []

        def authenticate(server: Any, session: Any, envelope: Any, mechanism: str, data: Any) -> AuthResult:
            ok = isinstance(data, LoginPassword) and data.login.decode() == user and data.password.decode() == password
            self.logins.append((mechanism, data.login.decode() if isinstance(data, LoginPassword) else "",
                                ok, session.ssl is not None))
            return AuthResult(success=ok, handled=False)  # not handled: the server answers 535

        self.port = closed_port()
        self.controller = Controller(
            self.handler, hostname="127.0.0.1", port=self.port, tls_context=context, require_starttls=True,
            authenticator=authenticate, auth_require_tls=True, auth_exclude_mechanism=["PLAIN"])
        self.controller.start()

    @property
    def messages(self) -> list[tuple[str, list[str], Message]]:
        return list(self.handler.messages)

    def close(self) -> None:
        self.controller.stop()


def feed(svc: Any, messages: list[tuple[str, bytes]], batch: int = 32) -> tuple[list[dict], list[float], list[float]]:
    """Messages through the service's batch path as its worker takes them (commit, then
    announce: MQTT and the notifier); returns the alarm events and, per batch, the seconds
    of the whole batch and of its announce alone."""
    events: list[dict] = []
    whole: list[float] = []
    announce: list[float] = []
    for i in range(0, len(messages), batch):
        t0 = time.perf_counter()
        outs = svc.handle_batch(messages[i:i + batch])
        t1 = time.perf_counter()
        events += svc.announce(outs)
        t2 = time.perf_counter()
        whole.append(t2 - t0)
        announce.append(t2 - t1)
    return events, whole, announce


def notify_file(directory: Path, notifications: str, *rules: str) -> Path:
    """A service file with a ``[notifications]`` table and ``[[notifications.rule]]`` tables."""
    path = directory / "service.toml"
    text = "[notifications]\n" + notifications + "\n" + "".join(f"\n[[notifications.rule]]\n{r}\n" for r in rules)
    path.write_text(text, encoding="utf-8")
    return path
