"""The service's log: one JSON object per line, warnings and uncaught exceptions included.

:func:`configure_logging` sends every record to one stream (stderr) as a JSON line with
``ts``, ``level``, ``logger``, ``msg`` and any ``extra`` fields; Python warnings (numpy's
RuntimeWarnings on overflow, invalid values, ...) and exceptions that end a thread or the
program go through the same logger, so the stream holds nothing but JSON lines
(docs/service.md, "Logs").
"""

from __future__ import annotations

import json
import logging
import math
import sys
import threading
import time
import warnings
from typing import Any

from monitor.model.timefmt import iso_utc
from monitor.redact import redact

#: A failure that keeps repeating is logged again at most this often, s.
LOG_REPEAT_S = 30.0


class JsonLineFormatter(logging.Formatter):
    """One JSON object per log line: ts, level, logger, msg and any ``extra`` fields.

    The message, text fields and the traceback pass through :func:`monitor.redact.redact`,
    so a URL's password never reaches the log, whoever wrote the line (a library too)."""

    _skip = frozenset(logging.LogRecord("", 0, "", 0, "", (), None).__dict__) | {"message"}

    def format(self, record: logging.LogRecord) -> str:
        out: dict[str, Any] = {
            "ts": iso_utc(record.created, timespec="milliseconds"),
            "level": record.levelname.lower(),
            "logger": record.name,
            "msg": redact(record.getMessage()),
        }
        for k, v in record.__dict__.items():
            if k not in self._skip and not k.startswith("_"):
                out[k] = redact(v) if isinstance(v, str) else v
        if record.exc_info:
            out["error"] = redact(self.formatException(record.exc_info))
        return json.dumps(out, default=str)


def configure_logging(level: str = "INFO", stream: Any = None) -> None:
    """Send the service's logs to ``stream`` (stderr) as JSON lines at ``level``.

    Python warnings (numpy's RuntimeWarnings on overflow, invalid values, ...) and
    exceptions that end a thread or the program go through the same logger, so the
    stream holds nothing but JSON lines."""
    handler = logging.StreamHandler(stream or sys.stderr)
    handler.setFormatter(JsonLineFormatter())
    root = logging.getLogger()
    root.handlers[:] = [handler]
    root.setLevel(level.upper())
    warnings.showwarning = _log_warning
    sys.excepthook = _log_uncaught
    threading.excepthook = _log_thread_exception


def _log_warning(message: Warning | str, category: type[Warning], filename: str, lineno: int,
                 file: Any = None, line: str | None = None) -> None:
    """``warnings.showwarning`` replaced: one JSON log record per warning shown."""
    logging.getLogger("py.warnings").warning(str(message), extra={
        "category": category.__name__, "where": f"{filename}:{lineno}"})


def _log_uncaught(exc_type: type[BaseException], exc: BaseException, tb: Any) -> None:
    logging.getLogger("whirlwatch").critical("uncaught exception", exc_info=(exc_type, exc, tb))


def _log_thread_exception(args: threading.ExceptHookArgs) -> None:
    if args.exc_type is SystemExit:
        return
    exc_info = None if args.exc_value is None else (args.exc_type, args.exc_value, args.exc_traceback)
    logging.getLogger("whirlwatch").error(
        "thread ended by an exception", extra={"thread_name": args.thread.name if args.thread else None},
        exc_info=exc_info)


class RepeatGate:
    """Says whether a repeating failure, by name, is due another log line: the first
    time, then at most once per ``every_s`` seconds (monotonic clock)."""

    def __init__(self, every_s: float = LOG_REPEAT_S) -> None:
        self.every_s = every_s
        self._last: dict[str, float] = {}

    def due(self, name: str, now_m: float | None = None) -> bool:
        now_m = time.monotonic() if now_m is None else now_m
        if now_m - self._last.get(name, -math.inf) < self.every_s:
            return False
        self._last[name] = now_m
        return True
