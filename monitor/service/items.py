"""A message on its way through a batch, and what became of it.

Each inbound message is decoded once (:func:`decode_batch`) into one of three items:
a :class:`WaveformMessage` (with its analysis, or None when the analysis failed), a
:class:`SpeedMessage`, or a :class:`RejectedMessage` that never became a reading. The
batch steps (monitor/service/batch.py) turn each into an :class:`Outcome`.

Items compare by identity: a batch may hold several copies of one message, each with its
own outcome.
"""

from __future__ import annotations

import datetime as dt
import enum
import logging
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from monitor.analysis.waveform import ReadingAnalysis, analyse_waveform
from monitor.io.ingest import SPEED_STREAM, decode_message
from monitor.io.ingest_limits import IngestLimits, Rejected
from monitor.model.readings import SpeedReading, Waveform
from monitor.model.registry import Registry
from monitor.store.writes import to_datetime

log = logging.getLogger("whirlwatch.service")

#: A stream: (machine, point) of waveforms, (machine, :data:`SPEED_STREAM`) of speed readings.
StreamKey = tuple[str, str]


class OutcomeKind(enum.StrEnum):
    """What became of a message (or of a change made outside the readings)."""

    WAVEFORM = "waveform"  # a new waveform, stored and evaluated
    SPEED = "speed"  # a new speed reading, stored and observed
    REJECTED = "rejected"  # not a reading: kept as a dead letter with its reason
    DUPLICATE = "duplicate"  # stored already (a redelivery or a repeat within the batch)
    PROCESSING_ERROR = "processing_error"  # processing fails deterministically: set aside
    ACKNOWLEDGED = "acknowledged"  # alarms acknowledged in the dashboard, applied
    STALE = "stale"  # stale-stream alarms raised by the periodic check
    REGISTRY = "registry"  # alarms closed by a registry edit
    RETIRED = "retired"  # a retired machine's alarms closed; its retained status removed


@dataclass
class Outcome:
    """What became of one message (returned by ``Service.handle_batch``) or of one change
    made outside the readings; its alarm events and the machine's retained status are what
    the service publishes."""

    kind: OutcomeKind
    machine: str | None = None
    reason: str | None = None
    events: list[dict[str, Any]] = field(default_factory=list)
    status: dict[str, Any] | None = None


@dataclass(frozen=True, eq=False)
class WaveformMessage:
    """A decoded waveform and its analysis (None: the analysis failed on it; the
    reading is still stored and its health checked). ``check``: look it up in the store
    before evaluating it (it may be stored already)."""

    topic: str
    payload: bytes
    reading: Waveform
    analysis: ReadingAnalysis | None
    check: bool

    @property
    def machine(self) -> str:
        return self.reading.machine

    @property
    def stream(self) -> StreamKey:
        return (self.reading.machine, self.reading.point)

    def store_key(self) -> tuple[str, str, dt.datetime]:
        """Its key in the ``measurements`` table: machine, point, time."""
        return (self.reading.machine, self.reading.point, to_datetime(self.reading.ts))


@dataclass(frozen=True, eq=False)
class SpeedMessage:
    """A decoded speed reading; ``check`` as for :class:`WaveformMessage`."""

    topic: str
    payload: bytes
    reading: SpeedReading
    check: bool

    @property
    def machine(self) -> str:
        return self.reading.machine

    @property
    def stream(self) -> StreamKey:
        return (self.reading.machine, SPEED_STREAM)

    def store_key(self) -> tuple[str, dt.datetime]:
        """Its key in the ``speed_readings`` table: machine, time."""
        return (self.reading.machine, to_datetime(self.reading.ts))


@dataclass(frozen=True, eq=False)
class RejectedMessage:
    """A message that did not become a reading, with the rejection's reason and detail."""

    topic: str
    payload: bytes
    rejection: Rejected


Decoded = WaveformMessage | SpeedMessage
Item = WaveformMessage | SpeedMessage | RejectedMessage


def stream_of(reading: Waveform | SpeedReading) -> StreamKey:
    """The stream a reading belongs to."""
    return (reading.machine, reading.point if isinstance(reading, Waveform) else SPEED_STREAM)


def analyse_reading(registry: Registry, w: Waveform) -> ReadingAnalysis | None:
    """The analysis of waveform ``w``; None (logged) when the analysis cannot use it."""
    machine = registry.machine(w.machine)
    try:
        return analyse_waveform(w, machine, machine.point(w.point))
    except Exception as exc:
        # A waveform the analysis cannot use (a dead sensor's flat zeros, too short for
        # the speed range, ...): health checks still run on it and sensor-fault alarms
        # follow; one bad block must not stall the stream behind it.
        log.warning("analysis failed", extra={
            "machine": w.machine, "point": w.point, "error": f"{type(exc).__name__}: {exc}"[:200]})
        return None


def decode_batch(
    messages: Sequence[tuple[str, bytes]],
    redelivered: Sequence[bool],
    *,
    registry: Registry,
    prefix: str,
    limits: IngestLimits,
    now: float,
    committed: Mapping[StreamKey, float],
    on_rejected: Callable[[str, Rejected], None],
) -> list[Item]:
    """Decode and validate each message (``monitor.io.ingest.decode_message``) and analyse
    each waveform (pure, outside any transaction), in order.

    ``committed`` holds the latest reading time this process committed per stream: the
    replay check compares against it and the batch's own earlier readings, and a reading
    not newer than it is marked ``check`` (it may be stored already). ``on_rejected`` is
    told of each rejection."""
    if len(redelivered) != len(messages):
        raise ValueError(
            f"redelivered has {len(redelivered)} flags for {len(messages)} messages; give one each."
        )
    pending: dict[StreamKey, float] = {}

    def last(machine: str, point: str) -> float | None:
        a, b = committed.get((machine, point)), pending.get((machine, point))
        return b if a is None else a if b is None else max(a, b)

    items: list[Item] = []
    for (topic, payload), dup in zip(messages, redelivered, strict=True):
        try:
            # A broker redelivery (DUP set) of a message whose commit never happened may
            # lie far behind its stream when another process or a later batch moved on:
            # the replay check would drop it, so redeliveries go to the idempotent insert.
            reading = decode_message(topic, payload, registry, prefix=prefix, now=now,
                                     last_ts=None if dup else last, limits=limits)
        except Rejected as rej:
            on_rejected(topic, rej)
            items.append(RejectedMessage(topic, payload, rej))
            continue
        key = stream_of(reading)
        pending[key] = max(reading.ts, pending.get(key, reading.ts))
        # Only a reading not newer than its stream's last commit here can already be
        # stored by this process: a redelivery, a repeat, an out-of-order copy. A newer one
        # stored by another process makes the insert come back short and the batch run
        # again with the check.
        stored = committed.get(key)
        check = dup or (stored is not None and reading.ts <= stored)
        if isinstance(reading, Waveform):
            items.append(WaveformMessage(topic, payload, reading, analyse_reading(registry, reading), check))
        else:
            items.append(SpeedMessage(topic, payload, reading, check))
    return items
