"""Counting rejected messages by reason, and deciding when one is worth a log line."""

from __future__ import annotations

import threading


class RejectionCounter:
    """Counts rejections by reason and says when one is worth a log line.

    ``record`` returns True for the first rejection of a reason in each ``interval_s``
    window, so a sensor that sends garbage ten times a second logs once a minute, with the
    number suppressed since. Thread-safe (metrics read it from another thread).
    """

    def __init__(self, interval_s: float = 60.0) -> None:
        if not interval_s >= 0:
            raise ValueError(f"interval_s must be non-negative seconds, got {interval_s!r}.")
        self.interval_s = float(interval_s)
        self._counts: dict[str, int] = {}
        self._last_logged: dict[str, float] = {}
        self._suppressed: dict[str, int] = {}
        self._lock = threading.Lock()

    def record(self, reason: str, now: float) -> bool:
        """Count one rejection at ``now`` (s, any monotonic or epoch clock); True = log it."""
        with self._lock:
            self._counts[reason] = self._counts.get(reason, 0) + 1
            last = self._last_logged.get(reason)
            if last is None or now - last >= self.interval_s:
                self._last_logged[reason] = now
                return True
            self._suppressed[reason] = self._suppressed.get(reason, 0) + 1
            return False

    def take_suppressed(self, reason: str) -> int:
        """How many rejections of ``reason`` went unlogged since the last call; resets it."""
        with self._lock:
            return self._suppressed.pop(reason, 0)

    def counts(self) -> dict[str, int]:
        """Rejections so far, by reason."""
        with self._lock:
            return dict(self._counts)

    @property
    def total(self) -> int:
        with self._lock:
            return sum(self._counts.values())
