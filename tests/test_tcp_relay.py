"""The loopback relay the outage tests cut: it passes bytes, refuses, falls silent, recovers."""

from __future__ import annotations

import socket
import time

import pytest
from fixtures_db import postgres_unreachable_reason
from tcp_relay import TcpRelay

pytestmark = pytest.mark.postgres


def _connect(port: int, timeout_s: int = 2):
    import psycopg

    return psycopg.connect(f"host=127.0.0.1 port={port} user=postgres dbname=test",
                           connect_timeout=timeout_s, autocommit=True)


def test_relay_passes_refuses_silences_and_restores() -> None:
    reason = postgres_unreachable_reason()
    if reason:
        pytest.skip(reason)
    import psycopg

    with TcpRelay("127.0.0.1", 5432) as relay:
        with _connect(relay.port) as conn:
            assert conn.execute("SELECT 1").fetchone() == (1,)

        relay.refuse()
        with pytest.raises(ConnectionRefusedError):
            socket.create_connection(("127.0.0.1", relay.port), timeout=2.0)

        relay.restore()
        with _connect(relay.port) as conn:
            assert conn.execute("SELECT 2").fetchone() == (2,)

        relay.silence()
        t0 = time.monotonic()
        with pytest.raises(psycopg.OperationalError):
            _connect(relay.port, timeout_s=2)  # the handshake gets no answer
        assert 1.5 < time.monotonic() - t0 < 10

        relay.restore()
        with _connect(relay.port) as conn:
            assert conn.execute("SELECT 3").fetchone() == (3,)
