"""Poison readings: a reading the service can never process is set aside, the rest go on.

A reading whose processing fails the same way every time (the database refuses one of its
values, or detection raises on it) must not stop the plant: the batch is split, the good
readings are committed, the offending message is kept as a dead letter with reason
``processing_error`` and a short cause, and a stream whose readings keep failing raises a
``processing_fault`` alarm (docs/alarms.md) that clears when its readings are processed
again. The poisons here are values production can meet:

- a reading id ending in half of a UTF-16 surrogate pair (a gateway that cut an id with an
  emoji at a length limit): JSON allows the escape (RFC 8259 section 7 leaves lone
  surrogates to the receiver), UTF-8 cannot encode it (RFC 3629 section 3), so neither
  database driver can send it;
- a reading id with a NUL character, which JSON allows (RFC 8259 section 7) and a
  PostgreSQL text value cannot hold (PostgreSQL manual, "Character Types");
- a mode frequency written by an older version without bounds (1e-80 Hz), on which the
  margin table's amplification overflows (issue 11, "One absurd value stops the plant").
"""

from __future__ import annotations

import json
import logging
import signal
import threading
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest
from broker import PrivateBroker, publish_many
from fixtures_db import fresh_database
from registry_api import settings_for
from service_helpers import (
    measurement_count,
    plant_store,
    service_process,
    stored_evaluator_state,
    straight_feed,
    traffic,
    wait_for,
    wait_started,
    waveform_keys,
)
from sqlalchemy import select, text

from monitor.service.service import Service
from monitor.store import Store
from monitor.store.models import Alarm, AlarmTransitionRow, DeadLetter

#: Half of the UTF-16 pair of U+1F600: JSON text may carry it as an escape (RFC 8259
#: section 7), UTF-8 cannot encode it (RFC 3629 section 3).
LONE_SURROGATE = "\ud83d"


def with_id(message: tuple[str, bytes], reading_id: str) -> tuple[str, bytes]:
    """``message`` with its payload's ``id`` replaced (json.dumps escapes what it must)."""
    topic, payload = message
    body = json.loads(payload)
    body["id"] = reading_id
    return topic, json.dumps(body).encode()


def bounded(fn: Callable[[], Any], svc: Service, timeout_s: float = 60.0) -> Any:
    """``fn()`` in a thread; fails (and stops the service's retry loop) if it has not
    returned within ``timeout_s`` seconds."""
    box: dict[str, Any] = {}

    def run() -> None:
        try:
            box["value"] = fn()
        except BaseException as exc:  # handed to the test below
            box["error"] = exc

    t = threading.Thread(target=run, daemon=True)
    t.start()
    t.join(timeout_s)
    if t.is_alive():
        svc.request_stop()  # the retry loop gives up at its next failure
        t.join(30)
        pytest.fail(f"the batch was still being retried after {timeout_s:g} s")
    if "error" in box:
        raise box["error"]
    return box["value"]


def dead_letters(url: str) -> list[DeadLetter]:
    store = Store.open(url)
    try:
        with store.session() as s:
            return list(s.scalars(select(DeadLetter).order_by(DeadLetter.id)))
    finally:
        store.close()


def alarm_history(url: str, kind: str) -> list[tuple[str, str | None, str, str, dict]]:
    """(machine, point, transition, state after, alarm evidence) of every transition of
    alarms of ``kind``, in order."""
    store = Store.open(url)
    try:
        with store.session() as s:
            rows = s.execute(
                select(Alarm.machine_id, Alarm.point_id, AlarmTransitionRow.transition,
                       AlarmTransitionRow.state, AlarmTransitionRow.evidence)
                .join(Alarm, Alarm.id == AlarmTransitionRow.alarm_id)
                .where(Alarm.kind == kind).order_by(AlarmTransitionRow.id)).all()
            return [tuple(r) for r in rows]
    finally:
        store.close()


def without_processing_faults(snapshot: dict) -> dict:
    """A detector snapshot without the engine's ``processing_fault`` streams (those are
    the service's bookkeeping of failures, not what the readings taught the detector)."""
    out = dict(snapshot)
    engine = dict(out["engine"])
    engine["streams"] = [st for st in engine["streams"] if st["key"][2] != "processing_fault"]
    out["engine"] = engine
    return out


def sample_waveforms(name: str, n: int) -> list[tuple[str, bytes]]:
    msgs = [m for m in traffic(name, 0, 4 * n) if m[0].endswith("/waveform")]
    assert len(msgs) >= n
    return msgs[:n]


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def plant_url(request: pytest.FixtureRequest, tmp_path: Path):
    with fresh_database(request.param, tmp_path) as url:
        plant_store(url)
        yield url


def test_poison_readings_are_set_aside_and_the_rest_committed(
    plant_url: str, caplog: pytest.LogCaptureFixture
) -> None:
    blower = sample_waveforms("ab-1", 6)
    pump = sample_waveforms("rwp-1", 6)
    poison = {2: with_id(blower[2], "ab-1 cut " + LONE_SURROGATE)}
    if plant_url.startswith("postgresql"):
        poison[7] = with_id(pump[3], "rwp-1\x00tail")
    batch = [m for pair in zip(blower, pump, strict=True) for m in pair]  # interleaved
    batch = [poison.get(i, m) for i, m in enumerate(batch)]
    good = [m for i, m in enumerate(batch) if i not in poison]
    svc = Service(settings_for(plant_url), stale_check_s=0)
    try:
        with caplog.at_level(logging.INFO, logger="whirlwatch.service"):
            outs = bounded(lambda: svc.handle_batch(batch), svc)
        count = svc.metrics.registry.get_sample_value
        errors = count("whirlwatch_processing_errors_total", {"error": "UnicodeEncodeError"})
        total = sum(count("whirlwatch_processing_errors_total", {"error": e}) or 0.0
                    for e in ("UnicodeEncodeError", "DataError"))
    finally:
        svc.store.close()
    assert [o.kind for o in outs] == ["processing_error" if i in poison else "waveform"
                                      for i in range(len(batch))]
    want = len(waveform_keys(good))
    assert measurement_count(plant_url) == (want, want)
    letters = dead_letters(plant_url)
    assert [(d.topic, d.reason) for d in letters] == [(poison[i][0], "processing_error") for i in sorted(poison)]
    assert "UnicodeEncodeError" in letters[0].detail
    if len(letters) > 1:
        assert "DataError" in letters[1].detail and "NUL" in letters[1].detail
    for d, i in zip(letters, sorted(poison), strict=True):
        assert d.payload_head == poison[i][1][:256] and d.payload_size == len(poison[i][1])
    assert errors == 1 and total == len(poison)
    # Logged once per poison, not once per attempt of the split.
    set_aside = [r for r in caplog.records if r.getMessage() == "reading set aside"]
    assert len(set_aside) == len(poison)
    # The detectors saw each good reading once and the poison not at all.
    for machine, msgs in (("ab-1", blower), ("rwp-1", pump)):
        fed = [m for m in good if m in msgs]
        assert without_processing_faults(stored_evaluator_state(plant_url, machine)) == straight_feed(fed, machine)


def test_a_stream_whose_readings_keep_failing_raises_processing_fault_until_they_pass(tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path / 'fault.sqlite'}"
    plant_store(url)
    msgs = sample_waveforms("ab-1", 10)
    broken = set(range(3, 7))  # four readings in a row from a gateway that cuts its ids
    stream = [with_id(m, f"ab-1-{i}" + LONE_SURROGATE) if i in broken else m for i, m in enumerate(msgs)]
    svc = Service(settings_for(url), stale_check_s=0)
    try:
        # One message per batch, as a live stream arrives.
        outs = [bounded(lambda m=m: svc.handle_batch([m]), svc)[0] for m in stream]
    finally:
        svc.store.close()
    assert [o.kind for o in outs] == ["processing_error" if i in broken else "waveform" for i in range(10)]
    history = alarm_history(url, "processing_fault")
    # Raised after the machine's persistence count of consecutive failures (3, the
    # default of docs/alarms.md), cleared by the next reading processed.
    assert [(m, p, t, st) for m, p, t, st, _ in history] == [
        ("ab-1", "nde-v", "raised", "active"), ("ab-1", "nde-v", "cleared", "cleared")]
    raised_evidence = history[0][4]
    assert "UnicodeEncodeError" in raised_evidence["cause"]
    assert raised_evidence["failures"] == 3
    events = [(e["kind"], e["transition"]) for o in outs for e in o.events]
    assert events == [("processing_fault", "raised"), ("processing_fault", "cleared")]
    # The raise went out with the reading that raised it; the status says so.
    raised_out = outs[5]
    assert raised_out.status is not None
    assert [a["kind"] for a in raised_out.status["active_alarms"]] == ["processing_fault"]
    assert len(dead_letters(url)) == len(broken)
    assert measurement_count(url) == (10 - len(broken), 10 - len(broken))


def test_an_old_registry_value_is_left_out_and_every_stream_goes_on(tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path / 'tiny-mode.sqlite'}"
    plant_store(url)
    store = Store.open(url)
    try:
        with store.transaction() as s:
            # Written by a version that did not bound mode frequencies (issue 11); it used
            # to overflow the amplification formula for every reading of the machine.
            s.execute(text("UPDATE modes SET frequency_hz = 1e-80 WHERE machine_id = 'ef-2'"))
    finally:
        store.close()
    fan = traffic("ef-2", 0, 24)  # waveforms and speed messages
    blower = sample_waveforms("ab-1", 8)
    batch = fan + blower
    svc = Service(settings_for(url), stale_check_s=0)
    try:
        outs = bounded(lambda: [o for i in range(0, len(batch), 8)
                                for o in svc.handle_batch(batch[i:i + 8])], svc, 120)
        # The mode is left out of the detector (docs/registry.md, "Bounds, and why").
        assert all(m.frequency_hz >= 0.1 for m in svc.registry.machine("ef-2").modes)
    finally:
        svc.store.close()
    fan_waves = [m for m in fan if m[0].endswith("/waveform")]
    kinds = [o.kind for o in outs]
    assert kinds.count("processing_error") == 0
    assert kinds.count("speed") == len(fan) - len(fan_waves)
    assert measurement_count(url) == (len(blower) + len(fan_waves),) * 2
    assert dead_letters(url) == []
    assert alarm_history(url, "processing_fault") == []
    assert without_processing_faults(stored_evaluator_state(url, "ab-1")) == straight_feed(blower, "ab-1")


@pytest.mark.broker
@pytest.mark.slow
def test_poison_in_the_stream_does_not_stop_the_plant_and_a_restart_goes_on(
    fresh_mosquitto: PrivateBroker, tmp_path: Path
) -> None:
    url = f"sqlite:///{tmp_path / 'store.sqlite'}"
    plant_store(url)
    pump = traffic("rwp-1", 0, 50)  # one retimed stream: the later part is newer
    first = traffic("ab-1", 0, 30) + pump[:30]
    poison_at = next(i for i, m in enumerate(first) if m[0].endswith("/waveform") and i > 10)
    poisoned = with_id(first[poison_at], "cut" + LONE_SURROGATE)
    first[poison_at] = poisoned
    later = pump[30:]
    good = [m for m in first + later if m != poisoned]
    want = len(waveform_keys(good))
    proc = service_process(fresh_mosquitto.url, url, tmp_path)
    try:
        wait_started(tmp_path, "svc", 1)
        publish_many(fresh_mosquitto, first)
        assert wait_for(lambda: measurement_count(url)[0] >= want - len(waveform_keys(later)), 60, 0.3)
        assert wait_for(lambda: len(dead_letters(url)) == 1, 10, 0.3)
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(30) == 0
        # While it is down the broker queues more; a restart subscribes and takes them.
        publish_many(fresh_mosquitto, later)
        proc = service_process(fresh_mosquitto.url, url, tmp_path)
        wait_started(tmp_path, "svc", 2)
        assert wait_for(lambda: measurement_count(url)[0] >= want, 60, 0.3)
    finally:
        proc.send_signal(signal.SIGTERM)
        proc.wait(30)
    assert measurement_count(url) == (want, want)
    letters = dead_letters(url)
    assert [(d.topic, d.reason) for d in letters] == [(poisoned[0], "processing_error")]
    log = (tmp_path / "svc.log").read_text(errors="replace")
    assert log.count('"reading set aside"') == 1
    assert '"database work failed' not in log
