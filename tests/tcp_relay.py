"""A small TCP relay on loopback that a test can cut, to make a database unreachable.

Tests must never stop the shared database server, so a service under test connects to the
database through a :class:`TcpRelay` instead of directly; the test then cuts the relay:

``refuse()``
    Drop every relayed connection and stop listening: new connections are refused at once
    (the server is down or its port closed).
``silence()``
    Keep every connection open and accept new ones, but stop passing bytes either way: a
    peer that neither answers nor closes (a dead network path, a hung server).
``restore()``
    Listen and relay again on the same port.

Every thread is a daemon and every wait is bounded, so a test that forgets ``close()``
cannot hang the session.
"""

from __future__ import annotations

import contextlib
import select
import socket
import threading
from collections.abc import Iterator


class TcpRelay:
    """Relay ``127.0.0.1:port`` to ``target_host:target_port``, one thread per connection.

    Parameters
    ----------
    target_host, target_port : str, int
        Where the relayed bytes go (the real server).
    port : int, optional
        Local port to listen on (0: a free one, kept across ``refuse``/``restore``).
    """

    def __init__(self, target_host: str, target_port: int, *, port: int = 0) -> None:
        self.target = (target_host, int(target_port))
        self._lock = threading.Lock()
        self._pairs: list[tuple[socket.socket, socket.socket]] = []
        self._silent = threading.Event()
        self._closed = threading.Event()
        self._listener: socket.socket | None = None
        self._acceptor: threading.Thread | None = None
        self.port = port
        self._listen()

    # -- control

    def refuse(self) -> None:
        """Stop listening and drop every relayed connection (connections are refused)."""
        self._stop_listening()
        self._drop_all()

    def silence(self) -> None:
        """Hold every connection open but pass no bytes (a silent peer)."""
        self._silent.set()

    def restore(self) -> None:
        """Relay again: bytes flow, and the port listens if it was refused."""
        self._silent.clear()
        if self._listener is None:
            self._listen()

    def close(self) -> None:
        self._closed.set()
        self._stop_listening()
        self._drop_all()

    def __enter__(self) -> TcpRelay:
        return self

    def __exit__(self, *_exc: object) -> None:
        self.close()

    # -- inside

    def _listen(self) -> None:
        sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        sock.bind(("127.0.0.1", self.port))
        sock.listen(64)
        sock.settimeout(0.2)
        self.port = sock.getsockname()[1]
        self._listener = sock
        self._acceptor = threading.Thread(target=self._accept_loop, args=(sock,), daemon=True,
                                          name=f"relay-accept-{self.port}")
        self._acceptor.start()

    def _stop_listening(self) -> None:
        sock, self._listener = self._listener, None
        if sock is not None:
            with contextlib.suppress(OSError):
                sock.close()
        if self._acceptor is not None:
            self._acceptor.join(2.0)
            self._acceptor = None

    def _drop_all(self) -> None:
        with self._lock:
            pairs, self._pairs = self._pairs, []
        for a, b in pairs:
            for s in (a, b):
                with contextlib.suppress(OSError):
                    s.shutdown(socket.SHUT_RDWR)
                with contextlib.suppress(OSError):
                    s.close()

    def _accept_loop(self, sock: socket.socket) -> None:
        while self._listener is sock and not self._closed.is_set():
            try:
                client, _ = sock.accept()
            except TimeoutError:
                continue
            except OSError:
                return
            try:
                upstream = socket.create_connection(self.target, timeout=5.0)
            except OSError:
                client.close()
                continue
            with self._lock:
                self._pairs.append((client, upstream))
            threading.Thread(target=self._pump, args=(client, upstream), daemon=True,
                             name=f"relay-pump-{self.port}").start()

    def _pump(self, a: socket.socket, b: socket.socket) -> None:
        peers = {a: b, b: a}
        try:
            while not self._closed.is_set():
                if self._silent.is_set():
                    # Hold the bytes where they are: the kernel buffers fill and both ends
                    # wait, as behind a dead network path.
                    self._closed.wait(0.1)
                    continue
                try:
                    ready, _, _ = select.select(list(peers), [], [], 0.2)
                except (OSError, ValueError):
                    return
                for s in ready:
                    if self._silent.is_set():
                        break
                    try:
                        data = s.recv(65536)
                    except OSError:
                        return
                    if not data:
                        return
                    peers[s].sendall(data)
        except OSError:
            return
        finally:
            with self._lock:
                if (a, b) in self._pairs:
                    self._pairs.remove((a, b))
            for s in (a, b):
                with contextlib.suppress(OSError):
                    s.close()


@contextlib.contextmanager
def relayed_postgres_url(url: str) -> Iterator[tuple[str, TcpRelay]]:
    """``url`` (a SQLAlchemy PostgreSQL URL at 127.0.0.1:5432) rewritten to go through a
    fresh relay, with the relay; the relay is closed afterwards."""
    from sqlalchemy.engine import make_url

    u = make_url(url)
    relay = TcpRelay(u.host or "127.0.0.1", u.port or 5432)
    try:
        yield u.set(host="127.0.0.1", port=relay.port).render_as_string(hide_password=False), relay
    finally:
        relay.close()
