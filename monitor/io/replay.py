"""Publish recorded or simulated traffic to a broker, as live sensors would.

The stream's timestamps are moved so that no message is stamped in the future and the
last one is stamped at the moment it is sent: with ``speedup = 1`` every message carries
the wall-clock time of its publication; with ``speedup = N`` the stream plays N times
faster and its timestamps keep their original spacing (a six-week stream replayed in
minutes still spans six weeks, ending now), so growth trends and reading intervals mean
what they meant. A service that rejects readings older than its ``max_age_s`` (30 days by
default) needs that bound widened for long accelerated replays; the demo does so.
"""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Callable, Iterable, Sequence
from pathlib import Path
from typing import Any

from monitor.io.mqtt_settings import MqttSettings, make_client
from monitor.io.streams import parse_ts, read_messages
from monitor.model.timefmt import iso_utc

Message = tuple[str, dict[str, Any]]


def load_streams(paths: Iterable[str | Path]) -> list[Message]:
    """Every ``(topic, payload dict)`` of the stream files, merged in time order (stable).

    Raises :class:`~monitor.io.streams.StreamError` for a malformed line."""
    out: list[tuple[float, int, Message]] = []
    for p in paths:
        for topic, payload in read_messages(p):
            out.append((parse_ts(payload["ts"]), len(out), (topic, payload)))
    out.sort(key=lambda x: (x[0], x[1]))
    return [m for _, _, m in out]


def retimed(messages: Sequence[Message], end_ts: float) -> tuple[list[tuple[float, Message]], float]:
    """``[(stream offset s, message with ts shifted)]`` so the last message is at ``end_ts``;
    also returns the shift applied, s."""
    if not messages:
        return [], 0.0
    times = [parse_ts(p["ts"]) for _, p in messages]
    t0, t1 = times[0], times[-1]
    shift = end_ts - t1
    out = []
    for (topic, payload), t in zip(messages, times, strict=True):
        body = dict(payload)
        body["ts"] = iso_utc(t + shift, timespec="milliseconds")
        out.append((t - t0, (topic, body)))
    return out, shift


class StreamPublisher:
    """A QoS 1 publisher (MQTT 5 or 3.1.1, clean session) that waits for every PUBACK at
    the end. Connects at once: OSError if the broker refuses, ConnectionError if it does
    not answer within 10 s; MqttConfigError for a bad URL."""

    def __init__(self, url: str, *, username: str | None = None, password: str | None = None,
                 protocol: str = "5", client_id: str = "") -> None:
        settings = MqttSettings(url=url, username=username, password=password, protocol=protocol)
        address = settings.address
        # An empty client id lets the broker (MQTT 5) or paho (3.1.1) choose one.
        self.client = make_client(settings, client_id, manual_ack=False, persistent=False)
        self.client.max_inflight_messages_set(200)
        self._connected = threading.Event()
        self.client.on_connect = lambda *a: self._connected.set()
        self.client.connect(address.host, address.port)
        self.client.loop_start()
        if not self._connected.wait(10.0):
            self.close()
            raise ConnectionError(f"no connection to the broker at {settings.shown_url} within 10 s.")
        self._infos: list[Any] = []

    def publish(self, topic: str, payload: bytes) -> None:
        self._infos.append(self.client.publish(topic, payload, qos=1))
        if len(self._infos) > 1000:
            self._drain(self._infos[:500])
            del self._infos[:500]

    def _drain(self, infos: list[Any], timeout_s: float = 60.0) -> None:
        deadline = time.monotonic() + timeout_s
        for info in infos:
            info.wait_for_publish(max(0.01, deadline - time.monotonic()))
            if not info.is_published():
                raise TimeoutError("the broker did not acknowledge a published message in time.")

    def flush(self) -> None:
        self._drain(self._infos)
        self._infos.clear()

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def replay(
    messages: Sequence[Message],
    publisher: StreamPublisher,
    *,
    speedup: float = 1.0,
    max_gap_s: float | None = None,
    stop: threading.Event | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> int:
    """Publish ``messages`` paced ``speedup`` times faster than recorded (0 = no pacing).

    ``max_gap_s`` caps a wall-clock wait between two messages (s), so quiet weeks of a
    stream do not stall a demo. Returns the number published (fewer if ``stop`` is set).
    """
    if speedup != 0 and speedup < 1:
        raise ValueError(f"speedup must be 0 (as fast as possible) or >= 1, got {speedup!r}.")
    if not messages:
        return 0
    times = [parse_ts(p["ts"]) for _, p in messages]
    # Wall-clock offset of each message: the recorded spacing / speedup, gaps capped.
    wall = [0.0]
    for a, b in zip(times, times[1:], strict=False):
        gap = (b - a) / speedup if speedup > 0 else 0.0
        wall.append(wall[-1] + (min(gap, max_gap_s) if max_gap_s is not None else gap))
    # Stamp the last message at the moment it will be sent; each message then carries a
    # time no later than its own sending (the wall spacing never exceeds the recorded one).
    plan, _ = retimed(messages, time.time() + wall[-1])
    start = time.monotonic()
    n = 0
    for w, (_offset, (topic, payload)) in zip(wall, plan, strict=True):
        if stop is not None and stop.is_set():
            break
        wait = start + w - time.monotonic()
        if wait > 0:
            if stop is None:
                time.sleep(wait)
            elif stop.wait(wait):
                break
        publisher.publish(topic, json.dumps(payload, separators=(",", ":")).encode())
        n += 1
        if progress is not None:
            progress(n, len(plan))
    publisher.flush()
    return n
