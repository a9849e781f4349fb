"""``processing_fault`` alarms: a stream whose readings keep failing to be processed.

A reading whose processing fails deterministically is set aside as a dead letter
(monitor/service/isolation.py); each such reading counts towards its stream's
``processing_fault`` alarm, raised (alert) after the machine's persistence count in a row
and cleared by the stream's next reading processed (docs/alarms.md). The stream is a
point's waveforms or a machine's speed messages.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence

from monitor.detection.alarms import AlarmKey, AlarmKind, Transition
from monitor.detection.evaluator import MachineEvaluator
from monitor.model.readings import SpeedReading, Waveform
from monitor.model.timefmt import iso_utc
from monitor.service.failures import printable

#: Alarm kind of a stream whose readings keep failing to be processed (docs/alarms.md).
PROCESSING_FAULT: AlarmKind = "processing_fault"


def fault_key(reading: Waveform | SpeedReading) -> AlarmKey:
    """The ``processing_fault`` alarm key of a reading's stream: its point's waveforms,
    or its machine's speed messages (docs/alarms.md)."""
    if isinstance(reading, Waveform):
        return AlarmKey(reading.machine, reading.point, PROCESSING_FAULT, "waveform")
    return AlarmKey(reading.machine, None, PROCESSING_FAULT, "speed")


def processing_failed(ev: MachineEvaluator, r: Waveform | SpeedReading, cause: str,
                      letter_id: int) -> list[Transition]:
    """One more reading of ``r``'s stream that could not be processed (``cause``, kept as
    dead letter ``letter_id``): raised (alert) after the machine's persistence count of
    such readings in a row."""
    evidence = {
        "cause": cause, "failures": ev.engine.persistence, "dead_letter_id": letter_id,
        "reading_ts": iso_utc(r.ts),
        "message": "readings of this stream cannot be processed and are kept as dead letters; "
                   "the machine is not watched here until they can",
    }
    rid = printable(r.reading_id) if isinstance(r, Waveform) and r.reading_id else None
    return ev.engine.update(fault_key(r), r.ts, "alert", "alert", evidence, rid)


def processing_resumed(evaluators: Iterable[MachineEvaluator],
                       processed: Sequence[Waveform | SpeedReading]) -> list[tuple[int, list[Transition]]]:
    """Streams with a ``processing_fault`` alarm (or failures counted towards one) whose
    readings were processed in this batch (``processed``, in arrival order): the alarm
    clears at once (or the count restarts). Returns the transitions with the index in
    ``processed`` of the stream's last reading, which carries them."""
    out: list[tuple[int, list[Transition]]] = []
    for ev in evaluators:
        for key in [k for k in ev.engine.alarm_keys() if k.kind == PROCESSING_FAULT]:
            last = next((i for i in range(len(processed) - 1, -1, -1) if fault_key(processed[i]) == key), None)
            if last is None:
                continue
            r = processed[last]
            rid = r.reading_id if isinstance(r, Waveform) else None
            out.append((last, ev.engine.update(
                key, r.ts, None, None, {"message": "readings of this stream are processed again"},
                rid, persistence=1)))
    return out
