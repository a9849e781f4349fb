"""Where the service's readings come from: one small interface, two implementations.

A :class:`Source` hands inbound messages, in arrival order and in batches, to one
handler on a worker thread, and is told (:meth:`Source.ack`) when each message's results
are committed. The service (monitor/service/service.py) depends on this interface only:

- :class:`monitor.io.mqtt_source.MessageSource`, the production source: a persistent MQTT
  session with manual acknowledgement (docs/mqtt.md);
- :class:`StreamFileSource`: the messages of a stream file (``.jsonl``,
  monitor/io/streams.py) read from disk, for tests and benchmarks that need no broker.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Protocol, TypeVar

from monitor.io.streams import StreamError, read_stream

log = logging.getLogger(__name__)


class Message(Protocol):
    """One inbound message as a source delivers it; ``dup``: the source delivered it
    before (a redelivery after a reconnect)."""

    @property
    def topic(self) -> str: ...

    @property
    def payload(self) -> bytes: ...

    @property
    def dup(self) -> bool: ...


class SourceCounts(Protocol):
    """A source's counters: messages received, acknowledged, and held between the two."""

    @property
    def received(self) -> int: ...

    @property
    def acked(self) -> int: ...

    @property
    def in_flight(self) -> int: ...


M = TypeVar("M", bound=Message)


class Source(Protocol[M]):
    """Inbound messages with acknowledgement after commit.

    ``start_batches(handler, max_batch)`` starts delivering: ``handler`` gets the
    messages already waiting (at most ``max_batch``, at least one, in arrival order) on
    one worker thread and calls :meth:`ack` for each once its results are committed;
    :meth:`stop` lets the worker finish what it was handed and stops. ``connected`` and
    ``last_error`` say whether the source can deliver and why not; :meth:`wait_subscribed`
    waits until it delivers (MQTT: connected and subscribed); :meth:`waiting_s` is how
    long messages have waited without one being acknowledged."""

    @property
    def stats(self) -> SourceCounts: ...

    @property
    def connected(self) -> bool: ...

    @property
    def last_error(self) -> str | None: ...

    def start_batches(self, handler: Callable[[list[M]], None], max_batch: int = 32) -> None: ...

    def wait_subscribed(self, timeout_s: float = 10.0) -> bool: ...

    def waiting_s(self, now_m: float | None = None) -> float: ...

    def ack(self, message: M) -> bool: ...

    def stop(self, timeout_s: float = 10.0) -> None: ...


# ----------------------------------------------------------------------------- stream files


@dataclass(frozen=True, eq=False)
class FileMessage:
    """One message of a stream file (never a redelivery: ``dup`` is false)."""

    topic: str
    payload: bytes
    dup: bool = False


@dataclass
class FileSourceStats:
    """Counters of a :class:`StreamFileSource` (read them, do not write them):
    ``malformed`` lines skipped, handler ``handler_errors``."""

    received: int = 0
    acked: int = 0
    in_flight: int = 0
    malformed: int = 0
    handler_errors: int = 0


class StreamFileSource:
    """The messages of a stream file, as a broker would deliver them from a backlog.

    The file is read on the worker thread, line by line (monitor/io/streams.py,
    :func:`read_stream`); each batch holds the next ``max_batch`` messages (every message
    of a file is waiting at once) and the next batch is read only after the handler
    returns. A malformed line is logged, counted (``stats.malformed``) and skipped. A
    handler that raises leaves its batch unacknowledged and counted
    (``stats.handler_errors``); a file cannot deliver it again, so the source goes on.
    :meth:`wait_done` waits until every message was handed over and acknowledged.
    """

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        self.stats = FileSourceStats()
        self.last_error: str | None = None
        self._lock = threading.Lock()
        self._held: set[int] = set()
        self._waiting_since: float | None = None
        self._stopping = threading.Event()
        self._opened = threading.Event()
        self._done = threading.Event()
        self._worker: threading.Thread | None = None

    @property
    def connected(self) -> bool:
        """True unless the file could not be read."""
        return self.last_error is None

    def start_batches(self, handler: Callable[[list[FileMessage]], None], max_batch: int = 32) -> None:
        """Start reading the file on a worker thread, handing ``handler`` batches of at
        most ``max_batch`` messages (ValueError when not a whole number >= 1)."""
        if isinstance(max_batch, bool) or not isinstance(max_batch, int) or max_batch < 1:
            raise ValueError(f"max_batch must be a whole number >= 1, got {max_batch!r}.")
        if self._worker is not None:
            raise RuntimeError(f"the stream file source of {self.path} was already started.")
        self._worker = threading.Thread(target=self._work, args=(handler, max_batch),
                                        name="file-source", daemon=True)
        self._worker.start()

    def wait_subscribed(self, timeout_s: float = 10.0) -> bool:
        """True once the file is open and being read (False after ``timeout_s`` s, or
        when it cannot be read)."""
        return self._opened.wait(timeout_s) and self.connected

    def wait_done(self, timeout_s: float) -> bool:
        """True once every message of the file was handed over and acknowledged (or the
        source stopped); False after ``timeout_s`` seconds."""
        return self._done.wait(timeout_s)

    def waiting_s(self, now_m: float | None = None) -> float:
        """Seconds messages have waited without one being acknowledged (0 while none waits)."""
        with self._lock:
            since = self._waiting_since
        if since is None:
            return 0.0
        return max(0.0, (time.monotonic() if now_m is None else now_m) - since)

    def ack(self, message: FileMessage) -> bool:
        """Acknowledge ``message`` (after its results are committed); False if it was
        acknowledged before."""
        return self._release(message, acked=True)

    def stop(self, timeout_s: float = 10.0) -> None:
        """Stop reading; the worker finishes the batch it handed over."""
        self._stopping.set()
        if self._worker is not None:
            self._worker.join(timeout_s)

    def _release(self, message: FileMessage, *, acked: bool) -> bool:
        with self._lock:
            if id(message) not in self._held:
                return False
            self._held.discard(id(message))
            if acked:
                self.stats.acked += 1
            self.stats.in_flight = len(self._held)
            self._waiting_since = time.monotonic() if self._held else None
            return True

    def _skip(self, error: StreamError) -> None:
        self.stats.malformed += 1
        log.warning("stream file line skipped", extra={"file": str(self.path), "line": error.line,
                                                       "problem": error.problem})

    def _work(self, handler: Callable[[list[FileMessage]], None], max_batch: int) -> None:
        try:
            with self.path.open("rb"):
                pass  # readable: the source is ready
            self._opened.set()
            batch: list[FileMessage] = []
            for topic, payload in read_stream(self.path, on_error=self._skip):
                if self._stopping.is_set():
                    break
                batch.append(FileMessage(topic, payload))
                if len(batch) == max_batch:
                    self._deliver(handler, batch)
                    batch = []
            if batch and not self._stopping.is_set():
                self._deliver(handler, batch)
        except OSError as exc:
            self.last_error = f"cannot read the stream file {self.path}: {exc}"
            log.error("stream file unreadable", extra={"file": str(self.path), "error": str(exc)})
        finally:
            self._opened.set()
            self._done.set()

    def _deliver(self, handler: Callable[[list[FileMessage]], None], batch: list[FileMessage]) -> None:
        with self._lock:
            self._held.update(id(m) for m in batch)
            self.stats.received += len(batch)
            self.stats.in_flight = len(self._held)
            if self._waiting_since is None:
                self._waiting_since = time.monotonic()
        try:
            handler(batch)
        except Exception:
            self.stats.handler_errors += 1
            log.exception("handler failed on %d messages of %s; left unacknowledged", len(batch), self.path)
        for m in batch:
            self._release(m, acked=False)  # a message the handler did not acknowledge
