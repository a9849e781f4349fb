"""A batch that fails deterministically: the reading that fails is found and set aside.

docs/service.md, "Failures": a batch whose transaction fails with an error that is not
transient (the same input fails the same way again) is split in halves until the reading
that fails is alone (at most 2 log2(batch) extra transactions); every other reading is
committed in arrival order, and that one is kept as a dead letter (reason
``processing_error``) and counted towards its stream's ``processing_fault`` alarm
(monitor/service/faults.py).
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Sequence

from sqlalchemy.orm import Session

from monitor.service.batch import commit_batch
from monitor.service.core import Core
from monitor.service.failures import is_transient, printable, short_cause
from monitor.service.faults import processing_failed
from monitor.service.items import Item, Outcome, OutcomeKind, RejectedMessage
from monitor.service.payloads import alarm_events, retained_statuses
from monitor.store import add_dead_letter, record_transitions

log = logging.getLogger("whirlwatch.service")


def commit_isolating(core: Core, items: Sequence[Item], *, check_all: bool = False) -> list[Outcome]:
    """Commit ``items`` in one transaction (:func:`commit_batch`, retried while the errors
    are transient); when it fails deterministically, split it in halves and commit each
    the same way, so the reading that fails is found alone and set aside
    (:func:`set_aside`). Returns one outcome per item, in order."""
    machines = sorted({it.machine for it in items if not isinstance(it, RejectedMessage)})
    attempts = 0

    def work() -> list[Outcome]:
        # A run after a failed one (a reading raced in, a database error) checks every
        # reading of the batch against the store.
        nonlocal attempts
        attempts += 1
        views = core.board.copies(machines)
        try:
            return commit_batch(core, items, check_all=check_all or attempts > 1)
        except BaseException:
            core.board.restore(views)  # what a failed run saw was never committed
            raise

    try:
        return core.retry(work, machines)
    except Exception as exc:
        if is_transient(exc) or core.stop.is_set():
            raise  # left unacknowledged: redelivered to the next session
        failure = exc
    if len(items) == 1:
        return [set_aside(core, items[0], failure)]
    log.debug("batch failed; splitting it", extra={"messages": len(items), "error": short_cause(failure)})
    half = (len(items) + 1) // 2
    return (commit_isolating(core, items[:half], check_all=True)
            + commit_isolating(core, items[half:], check_all=True))


def set_aside(core: Core, it: Item, failure: BaseException) -> Outcome:
    """Keep a message whose processing fails deterministically as a dead letter (reason
    ``processing_error``, the short cause as detail), count it, log it once, and feed its
    stream's ``processing_fault`` alarm. When even that fails, the dead letter alone; when
    that fails too, the log line is its only record (it cannot stop the stream)."""
    cause = short_cause(failure)
    r = None if isinstance(it, RejectedMessage) else it.reading
    machines = [r.machine] if r is not None else []
    machine = r.machine if r is not None else None

    def letter(s: Session) -> int:
        return add_dead_letter(s, topic=printable(it.topic), reason="processing_error",
                               detail=cause, payload=it.payload)

    def with_alarm() -> Outcome:
        assert r is not None
        with core.transaction() as s:
            letter_id = letter(s)
            taken = core.states.take(s, machines, acks=False)
            ev, closed = taken.evaluators[r.machine], taken.outside.get(r.machine, [])
            trans = processing_failed(ev, r, cause, letter_id)
            ids = record_transitions(s, trans) if trans else []
            core.states.save(s, {r.machine: r.ts})
            out = Outcome(OutcomeKind.PROCESSING_ERROR, machine=r.machine, reason="processing_error",
                          events=alarm_events(s, trans, ids, closed) if trans or closed else [],
                          status=retained_statuses(s, core.board, {r.machine: ev})[r.machine] if trans or closed else None)
        core.states.saved(machines)
        return out

    def letter_only() -> Outcome:
        with core.transaction() as s:
            letter(s)
        return Outcome(OutcomeKind.PROCESSING_ERROR, machine=machine, reason="processing_error")

    steps: list[Callable[[], Outcome]] = ([with_alarm] if r is not None else []) + [letter_only]
    out: Outcome | None = None
    for step in steps:
        try:
            out = core.retry(step, machines)
            break
        except Exception as exc:
            if is_transient(exc) or core.stop.is_set():
                raise
            log.error("could not record a processing error in full", extra={
                "topic": printable(it.topic)[:200], "cause": cause, "error": short_cause(exc)})
    if out is None:
        # Not even its dead letter could be stored: acknowledged without a trace in the
        # store, so it cannot stop the stream; this log line is its record.
        out = Outcome(OutcomeKind.PROCESSING_ERROR, machine=machine, reason="processing_error")
    core.set_aside += 1
    core.metrics.processing_errors.labels(error=cause.split(":", 1)[0]).inc()
    log.error("reading set aside", extra={
        "topic": printable(it.topic)[:200], "machine": machine,
        "point": getattr(r, "point", None), "reading_ts": r.ts if r is not None else None, "cause": cause})
    return out
