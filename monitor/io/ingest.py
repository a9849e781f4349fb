"""Decode and validate incoming MQTT messages into readings.

``decode_message`` turns one raw message (topic and payload bytes) into a
:class:`~monitor.model.readings.Waveform` or :class:`~monitor.model.readings.SpeedReading`, or raises
:class:`Rejected` with one of the stable reason ids in :data:`REJECTION_REASONS`. It never
raises anything else for any payload, never touches MQTT, the database or the clock beyond
``now`` (``time.time()`` when not given); the caller counts rejections with
:class:`RejectionCounter` and stores a :class:`DeadLetter`.

Exceptions::

    ValueError
     +-- Rejected(reason, detail)     a message that will never be a reading

Payloads and reasons are documented in ``docs/mqtt.md``; a test checks that every reason
listed here is documented there.
"""

from __future__ import annotations

import base64
import binascii
import datetime as _dt
import json
import math
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

try:  # SIMD base64 (~100x faster on an 87 kB block); the standard library otherwise
    from pybase64 import b64decode as _b64decode
except ImportError:  # pragma: no cover - pybase64 is a dependency, this is a fallback
    _b64decode = base64.b64decode

from monitor.model.readings import SpeedReading, Waveform
from monitor.model.registry import Registry
from monitor.model.units import UNIT_QUANTITY

#: Stable ids of every rejection, in the order the checks run. Documented in docs/mqtt.md.
REJECTION_REASONS: tuple[str, ...] = (
    "payload_too_large",
    "topic_prefix",
    "topic_malformed",
    "unknown_machine",
    "unknown_point",
    "not_utf8",
    "not_json",
    "not_object",
    "ts_missing",
    "ts_type",
    "ts_format",
    "ts_no_timezone",
    "ts_invalid",
    "ts_future",
    "ts_too_old",
    "ts_replayed",
    "fs_missing",
    "fs_type",
    "fs_not_finite",
    "fs_not_positive",
    "fs_absurd",
    "unit_missing",
    "unit_unknown",
    "unit_wrong_quantity",
    "samples_both",
    "samples_missing",
    "samples_type",
    "samples_not_numeric",
    "samples_not_finite",
    "samples_f32_type",
    "samples_f32_base64",
    "samples_f32_length",
    "samples_f32_not_finite",
    "samples_empty",
    "samples_too_few",
    "samples_too_many",
    "samples_absurd",
    "speed_both",
    "speed_missing",
    "speed_type",
    "speed_not_finite",
    "speed_negative",
    "speed_absurd",
    "id_invalid",
)

#: How much of a rejected payload a dead letter keeps, bytes.
DEAD_LETTER_BYTES = 256

#: The ``point`` argument passed to ``last_ts`` for speed readings (no point id is empty).
SPEED_STREAM = ""


class Rejected(ValueError):
    """A message that cannot become a reading.

    ``reason`` is one of :data:`REJECTION_REASONS`; ``detail`` is one sentence for the log
    and the dead-letter record, naming the field and the offending value (shortened).
    """

    def __init__(self, reason: str, detail: str) -> None:
        if reason not in REJECTION_REASONS:
            raise ValueError(f"reason must be one of REJECTION_REASONS, got {reason!r}.")
        super().__init__(f"{reason}: {detail}")
        self.reason = reason
        self.detail = detail


@dataclass(frozen=True)
class IngestLimits:
    """Bounds that separate a plausible message from an absurd one.

    Attributes
    ----------
    max_payload_bytes : int
        Largest payload accepted, bytes (8 MiB holds 2**20 float32 samples in base64).
    min_samples, max_samples : int
        Smallest and largest waveform block, samples.
    min_fs_hz, max_fs_hz : float
        Plausible sample rates, Hz. A rate inside this range but different from the
        point's registered ``fs_hz`` passes: that is a sensor fault for sensor health.
    max_abs_sample : float
        Largest sample magnitude accepted, in the payload's unit (1e9: a thousand times
        a 10^5 g shock accelerometer's range in m/s^2, a kilometre in um). Beyond any
        sensor of the accepted units, and low enough that every spectrum of the block
        stays finite in the store's float32 (3.4e38, IEEE 754 binary32).
    max_speed_hz : float
        Highest plausible running speed, Hz (2000 Hz = 120,000 r/min). Zero is accepted:
        a stopped machine is a valid reading.
    max_future_s : float
        How far ahead of ``now`` a timestamp may be, s (clock skew between sensor and host).
    max_age_s : float
        How far behind ``now`` a timestamp may be, s (a gateway's offline buffer).
    replay_window_s : float
        A reading older than the last accepted one for the same machine and point by more
        than this, s, is a replay. Small reorderings (redelivery after a crash, several
        consumers in a shared subscription) stay inside the window; exact duplicates are
        left to the idempotent insert.
    max_id_length : int
        Longest ``id`` string, characters.
    """

    max_payload_bytes: int = 8 * 1024 * 1024
    min_samples: int = 64
    max_samples: int = 1 << 20
    min_fs_hz: float = 1.0
    max_fs_hz: float = 1_000_000.0
    max_abs_sample: float = 1e9
    max_speed_hz: float = 2000.0
    max_future_s: float = 300.0
    max_age_s: float = 30 * 86400.0
    replay_window_s: float = 600.0
    max_id_length: int = 128

    def __post_init__(self) -> None:
        for name in (
            "max_payload_bytes", "min_samples", "max_samples", "min_fs_hz", "max_fs_hz",
            "max_abs_sample", "max_speed_hz", "max_future_s", "max_age_s", "replay_window_s", "max_id_length",
        ):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, int | float) or not v >= 0:
                raise ValueError(f"{name} must be a non-negative number, got {v!r}.")
        if not 1 <= self.min_samples <= self.max_samples:
            raise ValueError(
                f"min_samples must lie in [1, max_samples={self.max_samples}], got {self.min_samples!r}."
            )
        if not 0 < self.min_fs_hz < self.max_fs_hz:
            raise ValueError(
                f"min_fs_hz must be positive and below max_fs_hz={self.max_fs_hz}, got {self.min_fs_hz!r}."
            )


_DEFAULT_LIMITS = IngestLimits()


# ----------------------------------------------------------------------------- helpers


def _show(value: Any, limit: int = 60) -> str:
    text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _is_number(value: Any) -> bool:
    # JSON true/false arrive as bool, which is an int in Python: not a number here.
    return isinstance(value, int | float) and not isinstance(value, bool)


def _finite_number(value: Any, name: str, type_reason: str, finite_reason: str) -> float:
    if not _is_number(value):
        raise Rejected(type_reason, f"'{name}' must be a number, got {_show(value)}.")
    try:
        v = float(value)
    except OverflowError:
        v = math.inf
    if not math.isfinite(v):
        raise Rejected(finite_reason, f"'{name}' must be finite, got {_show(value)}.")
    return v


def parse_ts(value: Any) -> float:
    """Return a timestamp as epoch seconds (UTC) from epoch seconds or ISO 8601 with a zone.

    Raises :class:`Rejected` (``ts_type``, ``ts_format``, ``ts_no_timezone``, ``ts_invalid``).
    """
    if _is_number(value):
        try:
            ts = float(value)
        except OverflowError:
            ts = math.inf
        if not math.isfinite(ts) or ts <= 0:
            raise Rejected("ts_invalid", f"'ts' must be positive epoch seconds, got {_show(value)}.")
        return ts
    if not isinstance(value, str):
        raise Rejected(
            "ts_type", f"'ts' must be epoch seconds or an ISO 8601 string, got {_show(value)}."
        )
    try:
        dt = _dt.datetime.fromisoformat(value.strip())
    except ValueError:
        raise Rejected("ts_format", f"'ts' is not an ISO 8601 time: {_show(value)}.") from None
    if dt.tzinfo is None or dt.utcoffset() is None:
        raise Rejected(
            "ts_no_timezone",
            f"'ts' must state its zone (end in 'Z' or '+00:00'), got {_show(value)}.",
        )
    ts = dt.timestamp()
    if ts <= 0:
        raise Rejected("ts_invalid", f"'ts' must be after 1970-01-01, got {_show(value)}.")
    return ts


def _check_ts(
    raw: dict[str, Any],
    machine: str,
    point: str,
    now: float,
    last_ts: Callable[[str, str], float | None] | None,
    limits: IngestLimits,
) -> float:
    if "ts" not in raw:
        raise Rejected("ts_missing", "the payload has no 'ts'.")
    ts = parse_ts(raw["ts"])
    if ts > now + limits.max_future_s:
        raise Rejected(
            "ts_future",
            f"'ts' is {ts - now:.0f} s in the future; at most {limits.max_future_s:g} s is allowed.",
        )
    if ts < now - limits.max_age_s:
        raise Rejected(
            "ts_too_old", f"'ts' is {now - ts:.0f} s old; at most {limits.max_age_s:g} s is allowed."
        )
    if last_ts is not None:
        last = last_ts(machine, point)
        if last is not None and ts < last - limits.replay_window_s:
            raise Rejected(
                "ts_replayed",
                f"'ts' is {last - ts:.0f} s older than the last accepted reading of this stream.",
            )
    return ts


def _speed_hz(
    raw: dict[str, Any], hz_key: str, rpm_key: str, limits: IngestLimits, *, required: bool
) -> float | None:
    has_hz, has_rpm = hz_key in raw, rpm_key in raw
    if has_hz and has_rpm:
        raise Rejected("speed_both", f"give '{hz_key}' or '{rpm_key}', not both.")
    if not (has_hz or has_rpm):
        if required:
            raise Rejected("speed_missing", f"the payload has neither '{hz_key}' nor '{rpm_key}'.")
        return None
    key = hz_key if has_hz else rpm_key
    v = _finite_number(raw[key], key, "speed_type", "speed_not_finite")
    if v < 0:
        raise Rejected("speed_negative", f"'{key}' must not be negative, got {_show(raw[key])}.")
    hz = v if has_hz else v / 60.0
    if hz > limits.max_speed_hz:
        raise Rejected(
            "speed_absurd",
            f"'{key}' = {_show(raw[key])} is above {limits.max_speed_hz:g} Hz "
            f"({limits.max_speed_hz * 60:g} r/min).",
        )
    return hz


def _samples_from_list(value: Any, limits: IngestLimits) -> np.ndarray:
    if not isinstance(value, list):
        raise Rejected("samples_type", f"'samples' must be a list of numbers, got {type(value).__name__}.")
    _check_count(len(value), limits)
    if any(type(x) is bool for x in value):
        raise Rejected("samples_not_numeric", "'samples' holds true/false, not numbers.")
    try:
        arr = np.array(value)
    except (ValueError, TypeError, OverflowError):
        raise Rejected("samples_not_numeric", "'samples' must be a flat list of numbers.") from None
    if arr.ndim != 1 or arr.dtype.kind not in "iuf":
        raise Rejected("samples_not_numeric", "'samples' must be a flat list of numbers.")
    arr = arr.astype(np.float64)
    if not np.isfinite(arr).all():
        raise Rejected("samples_not_finite", "'samples' holds NaN or infinite values.")
    return arr


def _samples_from_f32(value: Any, limits: IngestLimits) -> np.ndarray:
    if not isinstance(value, str):
        raise Rejected(
            "samples_f32_type", f"'samples_f32' must be a base64 string, got {type(value).__name__}."
        )
    # Four base64 characters carry three bytes: refuse a huge block before decoding it.
    if len(value) // 4 * 3 // 4 > limits.max_samples:
        _check_count(len(value) // 4 * 3 // 4, limits)
    try:
        raw = _b64decode(value, validate=True)
    except (binascii.Error, ValueError):
        raise Rejected("samples_f32_base64", "'samples_f32' is not valid base64.") from None
    if len(raw) % 4:
        raise Rejected(
            "samples_f32_length",
            f"'samples_f32' decodes to {len(raw)} bytes, not a whole number of float32 values.",
        )
    _check_count(len(raw) // 4, limits)
    arr = np.frombuffer(raw, dtype="<f4").astype(np.float64)
    if not np.isfinite(arr).all():
        raise Rejected("samples_f32_not_finite", "'samples_f32' holds NaN or infinite values.")
    return arr


def _check_count(n: int, limits: IngestLimits) -> None:
    if n == 0:
        raise Rejected("samples_empty", "the waveform has no samples.")
    if n < limits.min_samples:
        raise Rejected(
            "samples_too_few", f"the waveform has {n} samples; at least {limits.min_samples} are needed."
        )
    if n > limits.max_samples:
        raise Rejected(
            "samples_too_many", f"the waveform has {n} samples; at most {limits.max_samples} are allowed."
        )


def _reading_id(raw: dict[str, Any], limits: IngestLimits) -> str | None:
    if "id" not in raw or raw["id"] is None:
        return None
    rid = raw["id"]
    if not isinstance(rid, str) or not rid or len(rid) > limits.max_id_length:
        raise Rejected(
            "id_invalid",
            f"'id' must be a string of 1-{limits.max_id_length} characters, got {_show(rid)}.",
        )
    return rid


# ----------------------------------------------------------------------------- public


def parse_topic(topic: str, prefix: str = "whirlwatch") -> tuple[str, str | None, str]:
    """Split an inbound topic into ``(machine, point, kind)``; ``point`` is None for speed.

    ``kind`` is ``"waveform"`` or ``"speed"``. Raises :class:`Rejected` (``topic_prefix``,
    ``topic_malformed``).
    """
    head = prefix.rstrip("/") + "/"
    if not topic.startswith(head):
        raise Rejected("topic_prefix", f"topic {_show(topic)} is not under {head!r}.")
    levels = topic[len(head) :].split("/")
    if len(levels) == 3 and levels[2] == "waveform" and levels[0] and levels[1]:
        return levels[0], levels[1], "waveform"
    if len(levels) == 2 and levels[1] == "speed" and levels[0]:
        return levels[0], None, "speed"
    raise Rejected(
        "topic_malformed",
        f"topic {_show(topic)} is neither {head}MACHINE/POINT/waveform nor {head}MACHINE/speed.",
    )


def decode_message(
    topic: str,
    payload: bytes,
    registry: Registry,
    *,
    prefix: str = "whirlwatch",
    now: float | None = None,
    last_ts: Callable[[str, str], float | None] | None = None,
    limits: IngestLimits = _DEFAULT_LIMITS,
) -> Waveform | SpeedReading:
    """Decode one inbound MQTT message into a reading.

    Parameters
    ----------
    topic : str
        ``{prefix}/{machine}/{point}/waveform`` or ``{prefix}/{machine}/speed``.
    payload : bytes
        UTF-8 JSON object as in docs/mqtt.md.
    registry : Registry
        Known machines and points; anything else is rejected.
    prefix : str
        Topic prefix.
    now : float, optional
        Current time, epoch seconds (UTC), for the future/age checks; ``time.time()`` if None.
    last_ts : callable, optional
        ``last_ts(machine, point)`` -> epoch seconds of the last accepted reading of that
        stream, or None. Speed readings use ``point = SPEED_STREAM`` (the empty string).
    limits : IngestLimits
        Plausibility bounds.

    Returns
    -------
    Waveform or SpeedReading
        Samples as float64 in the payload's unit; speed in Hz (rev/s); ``ts`` in epoch s.

    Raises
    ------
    Rejected
        With ``reason`` in :data:`REJECTION_REASONS`; never any other exception.
    """
    if len(payload) > limits.max_payload_bytes:
        raise Rejected(
            "payload_too_large",
            f"the payload has {len(payload)} bytes; at most {limits.max_payload_bytes} are allowed.",
        )
    machine_id, point_id, kind = parse_topic(topic, prefix)
    try:
        machine = registry.machine(machine_id)
    except KeyError:
        raise Rejected("unknown_machine", f"machine {_show(machine_id)} is not in the registry.") from None
    point = None
    if point_id is not None:
        try:
            point = machine.point(point_id)
        except KeyError:
            raise Rejected(
                "unknown_point", f"machine {machine_id!r} has no measurement point {_show(point_id)}."
            ) from None
    try:
        text = bytes(payload).decode("utf-8")
    except UnicodeDecodeError:
        raise Rejected("not_utf8", "the payload is not UTF-8 text.") from None
    try:
        raw = json.loads(text)
    except (ValueError, RecursionError):
        raise Rejected("not_json", "the payload is not JSON.") from None
    if not isinstance(raw, dict):
        raise Rejected("not_object", f"the payload must be a JSON object, got {type(raw).__name__}.")
    t_now = time.time() if now is None else float(now)

    if point is None:
        ts = _check_ts(raw, machine_id, SPEED_STREAM, t_now, last_ts, limits)
        hz = _speed_hz(raw, "hz", "rpm", limits, required=True)
        assert hz is not None
        return SpeedReading(machine=machine_id, ts=ts, speed_hz=hz)

    ts = _check_ts(raw, machine_id, point.id, t_now, last_ts, limits)
    if "fs" not in raw:
        raise Rejected("fs_missing", "the payload has no 'fs' (sample rate, Hz).")
    fs = _finite_number(raw["fs"], "fs", "fs_type", "fs_not_finite")
    if fs <= 0:
        raise Rejected("fs_not_positive", f"'fs' must be positive, got {_show(raw['fs'])}.")
    if not limits.min_fs_hz <= fs <= limits.max_fs_hz:
        raise Rejected(
            "fs_absurd",
            f"'fs' = {fs:g} Hz is outside {limits.min_fs_hz:g}-{limits.max_fs_hz:g} Hz.",
        )
    if "unit" not in raw:
        raise Rejected("unit_missing", "the payload has no 'unit'.")
    unit = raw["unit"]
    if not isinstance(unit, str) or unit not in UNIT_QUANTITY:
        raise Rejected(
            "unit_unknown", f"'unit' must be one of {tuple(UNIT_QUANTITY)}, got {_show(unit)}."
        )
    if UNIT_QUANTITY[unit] != point.quantity:
        raise Rejected(
            "unit_wrong_quantity",
            f"point {point.id!r} measures {point.quantity}; {unit!r} is a unit of {UNIT_QUANTITY[unit]}.",
        )
    has_list, has_f32 = "samples" in raw, "samples_f32" in raw
    if has_list and has_f32:
        raise Rejected("samples_both", "give 'samples' or 'samples_f32', not both.")
    if not (has_list or has_f32):
        raise Rejected("samples_missing", "the payload has neither 'samples' nor 'samples_f32'.")
    samples = (
        _samples_from_list(raw["samples"], limits)
        if has_list
        else _samples_from_f32(raw["samples_f32"], limits)
    )
    # Finite, but beyond any sensor: its spectrum would overflow the store's float32
    # into an infinite bin (invalid JSON in the API).
    peak = max(float(samples.max()), -float(samples.min()))
    if peak > limits.max_abs_sample:
        raise Rejected(
            "samples_absurd",
            f"a sample of magnitude {peak:.3g} {unit} is beyond the plausible "
            f"{limits.max_abs_sample:g} {unit}.",
        )
    speed = _speed_hz(raw, "speed_hz", "speed_rpm", limits, required=False)
    return Waveform(
        machine=machine_id,
        point=point.id,
        ts=ts,
        fs_hz=fs,
        unit=unit,
        samples=samples,
        speed_hz=speed,
        reading_id=_reading_id(raw, limits),
    )


def encode_waveform(waveform: Waveform, *, f32: bool = True) -> bytes:
    """The payload a sensor sends for ``waveform`` (``samples_f32`` unless ``f32`` is False).

    With ``f32`` the samples are rounded to float32, which is what the fast path carries.
    """
    body: dict[str, Any] = {"ts": waveform.ts, "fs": waveform.fs_hz, "unit": waveform.unit}
    data = np.asarray(waveform.samples)
    if f32:
        body["samples_f32"] = base64.b64encode(data.astype("<f4").tobytes()).decode("ascii")
    else:
        body["samples"] = data.astype(float).tolist()
    if waveform.speed_hz is not None:
        body["speed_hz"] = waveform.speed_hz
    if waveform.reading_id is not None:
        body["id"] = waveform.reading_id
    return json.dumps(body, separators=(",", ":"), allow_nan=False).encode("utf-8")


def encode_speed(reading: SpeedReading) -> bytes:
    """The payload of a speed reading (``hz``)."""
    return json.dumps({"ts": reading.ts, "hz": reading.speed_hz}, allow_nan=False).encode("utf-8")


# ----------------------------------------------------------------------------- counting


@dataclass(frozen=True)
class DeadLetter:
    """A rejected message as kept by the store.

    ``at`` is when it was rejected (epoch s, UTC); ``first_bytes`` the first 256 bytes of the
    payload, enough to recognise the sender's mistake without storing a huge body.
    """

    at: float
    topic: str
    reason: str
    detail: str
    first_bytes: bytes

    @classmethod
    def from_rejection(
        cls, topic: str, payload: bytes, rejected: Rejected, at: float
    ) -> DeadLetter:
        return cls(
            at=at,
            topic=topic,
            reason=rejected.reason,
            detail=rejected.detail,
            first_bytes=bytes(payload[:DEAD_LETTER_BYTES]),
        )


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
