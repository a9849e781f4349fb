"""Stream files: recorded MQTT traffic as ``.jsonl`` (the payloads of docs/mqtt.md).

One JSON object per line, ``{"topic": ..., "payload": {...}}``, in time order. The
payload is exactly the JSON an MQTT message would carry, so replaying a file publishes
what a live sensor would, and reading one back (:func:`read_stream`) yields the payload
bytes to hand to ``monitor.io.ingest.decode_message`` like live traffic.

Payloads written here:

- waveform, on ``{prefix}/{machine}/{point}/waveform``: ``ts`` (ISO 8601 UTC, ms),
  ``fs`` (Hz), ``unit``, ``samples_f32`` (base64 of little-endian float32), optional
  ``speed_hz``, ``once_per_rev_s`` (pulse times, s from the first sample) and ``id``;
- speed, on ``{prefix}/{machine}/speed``: ``ts`` and ``hz``.
"""

from __future__ import annotations

import base64
import json
import os
from collections.abc import Callable, Iterable, Iterator
from pathlib import Path
from typing import Any

import numpy as np

from monitor.model.readings import SpeedReading, Waveform
from monitor.model.timefmt import iso_utc, parse_iso_utc

DEFAULT_PREFIX = "whirlwatch"


class StreamError(ValueError):
    """A stream file line is malformed; the message names the file and line."""

    def __init__(self, path: str | Path, line: int, problem: str) -> None:
        self.path = str(path)
        self.line = line
        self.problem = problem
        super().__init__(f"{self.path}, line {line}: {problem}")


def parse_ts(value: Any) -> float:
    """ISO 8601 string (``Z`` or offset; naive read as UTC) or epoch seconds -> epoch seconds."""
    if isinstance(value, bool):
        raise ValueError(f"ts must be an ISO 8601 time or epoch seconds, got {value!r}.")
    if isinstance(value, int | float):
        return float(value)
    if isinstance(value, str):
        return parse_iso_utc(value).timestamp()
    raise ValueError(f"ts must be an ISO 8601 time or epoch seconds, got {value!r}.")


def encode_f32(samples: np.ndarray) -> str:
    """Samples -> base64 of little-endian float32."""
    return base64.b64encode(np.asarray(samples, dtype="<f4").tobytes()).decode("ascii")


def waveform_topic(prefix: str, machine: str, point: str) -> str:
    return f"{prefix}/{machine}/{point}/waveform"


def speed_topic(prefix: str, machine: str) -> str:
    return f"{prefix}/{machine}/speed"


def waveform_payload(w: Waveform) -> dict[str, Any]:
    """The MQTT payload (a JSON-ready dict) of waveform ``w``; samples as float32 base64,
    pulse times as a list of seconds."""
    out: dict[str, Any] = {
        "ts": iso_utc(w.ts, timespec="milliseconds"),
        "fs": float(w.fs_hz),
        "unit": w.unit,
        "samples_f32": encode_f32(w.samples),
    }
    if w.speed_hz is not None:
        out["speed_hz"] = round(float(w.speed_hz), 6)
    if w.once_per_rev_s is not None:
        # repr of a double reads back to the same double: pulse times round-trip exactly
        out["once_per_rev_s"] = [float(t) for t in w.once_per_rev_s]
    if w.reading_id is not None:
        out["id"] = w.reading_id
    return out


def speed_payload(r: SpeedReading) -> dict[str, Any]:
    """The MQTT payload of speed reading ``r``: ``ts`` (ISO 8601 UTC) and ``hz``."""
    return {"ts": iso_utc(r.ts, timespec="milliseconds"), "hz": round(float(r.speed_hz), 6)}


def reading_message(
    reading: Waveform | SpeedReading, prefix: str = DEFAULT_PREFIX
) -> tuple[str, dict[str, Any]]:
    """(topic, payload) of a waveform or speed reading."""
    if isinstance(reading, Waveform):
        return waveform_topic(prefix, reading.machine, reading.point), waveform_payload(reading)
    return speed_topic(prefix, reading.machine), speed_payload(reading)


def write_stream(path: str | Path, messages: Iterable[tuple[str, Any]]) -> int:
    """Write ``(topic, payload)`` pairs to ``path`` as a stream file; returns the count.

    The file appears complete or not at all (written beside it, then renamed).
    """
    p = Path(path)
    tmp = p.with_name(p.name + ".part")
    n = 0
    try:
        with tmp.open("w", encoding="utf-8", newline="\n") as fh:
            for topic, payload in messages:
                fh.write(json.dumps({"topic": topic, "payload": payload}, separators=(",", ":")))
                fh.write("\n")
                n += 1
        os.replace(tmp, p)
    finally:
        if tmp.exists():
            tmp.unlink()
    return n


def read_messages(
    path: str | Path, *, on_error: Callable[[StreamError], None] | None = None
) -> Iterator[tuple[str, Any]]:
    """Yield ``(topic, payload)`` for each line of a stream file, the payload as parsed JSON.

    Blank lines are skipped. A malformed line raises :class:`StreamError` naming the file
    and line, or, when ``on_error`` is given, is passed to it and skipped. Raises OSError
    if the file cannot be opened.
    """
    p = Path(path)
    with p.open("r", encoding="utf-8", errors="replace") as fh:
        for lineno, line in enumerate(fh, start=1):
            if not line.strip():
                continue
            try:
                yield _parse_line(p, lineno, line)
            except StreamError as exc:
                if on_error is None:
                    raise
                on_error(exc)


def read_stream(
    path: str | Path, *, on_error: Callable[[StreamError], None] | None = None
) -> Iterator[tuple[str, bytes]]:
    """Yield ``(topic, payload_bytes)`` for each line of a stream file (as :func:`read_messages`).

    ``payload_bytes`` is the payload serialised as compact UTF-8 JSON, as MQTT would
    carry it, to hand to ``monitor.io.ingest.decode_message`` like live traffic.
    """
    for topic, payload in read_messages(path, on_error=on_error):
        yield topic, json.dumps(payload, separators=(",", ":")).encode("utf-8")


def _parse_line(path: Path, lineno: int, line: str) -> tuple[str, Any]:
    try:
        obj = json.loads(line)
    except json.JSONDecodeError as exc:
        raise StreamError(path, lineno, f"not valid JSON ({exc.msg}).") from None
    if not isinstance(obj, dict):
        raise StreamError(path, lineno, 'expected an object {"topic": ..., "payload": ...}.')
    topic = obj.get("topic")
    if not isinstance(topic, str) or not topic:
        raise StreamError(path, lineno, "'topic' must be a non-empty string.")
    if "payload" not in obj:
        raise StreamError(path, lineno, "'payload' is missing.")
    return topic, obj["payload"]
