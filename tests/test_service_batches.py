"""Group commit: repeats inside one batch, and readings raced in by another process.

Delivery contract (docs/mqtt.md, "Delivery semantics"): at least once from the broker,
effectively once in the database and in the detector. A message published several times is stored once, feeds
the detector once, and every copy is acknowledged; two processes in a shared subscription
that receive copies of the same reading store it once and record its alarm transitions once.
"""

from __future__ import annotations

import json
import signal
import threading
import urllib.request
from collections import Counter
from collections.abc import Iterator
from pathlib import Path

import pytest
from broker import PrivateBroker, free_port, publish_many
from fixtures_db import fresh_database
from prometheus_client.parser import text_string_to_metric_families
from service_helpers import (
    PLANT,
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
from sqlalchemy import select

from monitor.config import load_settings
from monitor.detection.evaluator import MachineEvaluator
from monitor.io.ingest import decode_message
from monitor.model.registry_file import load_registry
from monitor.service.service import Service
from monitor.store import Store
from monitor.store.models import Alarm, AlarmTransitionRow

pytestmark = pytest.mark.broker


def settings_for(url: str, broker_url: str = "mqtt://127.0.0.1:1", client_id: str = "svc-batch"):
    return load_settings(None, env={}, overrides={
        "broker.url": broker_url, "database.url": url, "broker.client_id": client_id,
        "broker.reconnect_max_s": 1.0,
    })


def sqlite(tmp_path: Path, name: str) -> str:
    url = f"sqlite:///{tmp_path / name}"
    plant_store(url)
    return url


def waveforms(name: str, n: int) -> list[tuple[str, bytes]]:
    """The first ``n`` waveform messages of one sample stream, ending now."""
    msgs = [m for m in traffic(name, 0, 4 * n) if m[0].endswith("/waveform")]
    assert len(msgs) >= n
    return msgs[:n]




def baseline_lengths(snapshot: dict) -> dict[tuple[str, str], int]:
    return {(p, f): len(b["values"]) for p, f, b in snapshot["baselines"]}


def test_repeats_within_one_batch_feed_the_detector_once(tmp_path: Path) -> None:
    m1, m2, m3 = waveforms("ab-1", 3)
    url = sqlite(tmp_path, "batch.sqlite")
    svc = Service(settings_for(url), stale_check_s=0)  # never started: no MQTT, one real store
    try:
        outs = svc.handle_batch([m1, m1, m1, m2, m2, m3, m3])
        # The last one redelivered in a later batch (its PUBACK lost, say). An older one
        # would be rejected as a replay (more than the replay window behind the stream).
        again = svc.handle_batch([m3])
        memory = svc.detector("ab-1").snapshot()
    finally:
        svc.store.close()
    assert [o.kind for o in outs] == ["waveform", "duplicate", "duplicate", "waveform", "duplicate",
                                      "waveform", "duplicate"]
    assert [o.kind for o in again] == ["duplicate"]
    assert measurement_count(url) == (3, 3)
    reference = straight_feed([m1, m2, m3], "ab-1")
    # Each baseline holds one value per distinct reading: three, not the seven copies
    # (fewer only if the learning window were shorter than three readings).
    window = MachineEvaluator(load_registry(PLANT).machine("ab-1")).settings.baseline_readings
    lengths = baseline_lengths(stored_evaluator_state(url, "ab-1"))
    assert lengths and set(lengths.values()) == {min(3, window)}
    # The whole detector state, in memory and as stored, is that of a single feed.
    assert memory == reference
    assert stored_evaluator_state(url, "ab-1") == reference


def test_repeated_publishes_are_stored_once_and_all_acknowledged(
    fresh_mosquitto: PrivateBroker, tmp_path: Path
) -> None:
    readings = waveforms("ab-1", 10)
    copies = 4
    published = [m for m in readings for _ in range(copies)]  # m1 m1 m1 m1 m2 m2 ...
    url = sqlite(tmp_path, "store.sqlite")
    settings = settings_for(url, fresh_mosquitto.url, "svc-dup")
    # A first start creates the persistent session; while the service is away the broker
    # queues everything, so on the next start the backlog arrives at once and is batched.
    svc = Service(settings, stale_check_s=0)
    svc.start()
    svc.stop()
    publish_many(fresh_mosquitto, published)
    svc = Service(settings, stale_check_s=0)
    svc.start()
    try:
        def handled() -> float:
            return sum(svc.metrics.registry.get_sample_value("whirlwatch_messages_total", {"kind": k}) or 0.0
                       for k in ("waveform", "duplicate", "rejected", "speed"))

        assert wait_for(lambda: handled() >= len(published), 30), handled()
        sample = svc.metrics.registry.get_sample_value
        batches = sample("whirlwatch_batch_size_count")
        small = sample("whirlwatch_batch_size_bucket", {"le": "2.0"})
        assert sample("whirlwatch_messages_total", {"kind": "waveform"}) == len(readings)
        assert sample("whirlwatch_messages_total", {"kind": "duplicate"}) == len(readings) * (copies - 1)
        assert sample("whirlwatch_batch_size_sum") == len(published)
        # Copies come in runs of four, so any three consecutive messages hold two copies of
        # one reading: a batch of three or more proves repeats were handled inside a batch.
        assert small < batches, (small, batches)
    finally:
        svc.stop()
    assert measurement_count(url) == (len(readings), len(readings))
    assert stored_evaluator_state(url, "ab-1") == straight_feed(readings, "ab-1")
    # Every copy was acknowledged: the same persistent session gets nothing back.
    svc = Service(settings, stale_check_s=0)
    svc.start()
    try:
        threading.Event().wait(2.0)
        assert svc.source is not None and svc.source.stats.received == 0
    finally:
        svc.stop()
    assert measurement_count(url) == (len(readings), len(readings))


# ----------------------------------------------------------------------------- two processes


@pytest.fixture()
def pg_url(tmp_path: Path) -> Iterator[str]:
    with fresh_database("postgresql", tmp_path) as url:
        plant_store(url)
        yield url


def scrape(port: int) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    """``/metrics`` of a running service as {(sample name, sorted labels): value}."""
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as r:
        text = r.read().decode()
    return {(s.name, tuple(sorted(s.labels.items()))): s.value
            for fam in text_string_to_metric_families(text) for s in fam.samples}


def messages_by_kind(metrics: dict) -> dict[str, float]:
    return {dict(labels)["kind"]: v for (name, labels), v in metrics.items()
            if name == "whirlwatch_messages_total"}


@pytest.mark.postgres
@pytest.mark.slow
def test_two_processes_receiving_the_same_readings_store_them_once(
    fresh_mosquitto: PrivateBroker, pg_url: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    two_processes_store_each_reading_once(fresh_mosquitto, pg_url, tmp_path, monkeypatch)


@pytest.mark.slow
def test_two_processes_share_one_sqlite_file_through_the_writer_gate(
    fresh_mosquitto: PrivateBroker, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Same checks on SQLite: the writers of both processes queue on the file lock beside
    # the database (Store.writer_gate) and still store every reading exactly once.
    url = sqlite(tmp_path, "shared.sqlite")
    two_processes_store_each_reading_once(fresh_mosquitto, url, tmp_path, monkeypatch)
    assert (tmp_path / "shared.sqlite.writers").exists()


def two_processes_store_each_reading_once(
    broker: PrivateBroker, url: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # The fan's run-up through its pedestal mode raises a resonance alarm (API 684 margin,
    # see test_service.py), so there are transitions that a double evaluation would repeat.
    msgs = traffic("ef-2", 0, 120)
    want = len(waveform_keys(msgs))
    speeds = sum(1 for t, _ in msgs if t.endswith("/speed"))
    # Each message twice in a row: the broker hands consecutive messages of a shared
    # subscription to different members, so the copies race into the store from both.
    published = [m for m in msgs for _ in range(2)]
    ports = [free_port(), free_port()]
    procs = []
    for i, port in enumerate(ports):
        # The service file's key service.metrics_address, set through its environment variable.
        monkeypatch.setenv("WHIRLWATCH_SERVICE_METRICS_ADDRESS", f"127.0.0.1:{port}")
        procs.append(service_process(broker.url, url, tmp_path, client_id=f"svc-{i}", group="g"))
    try:
        for i in range(2):
            wait_started(tmp_path, f"svc-{i}", 1)
        publish_many(broker, published)

        def totals() -> list[dict[str, float]]:
            return [messages_by_kind(scrape(p)) for p in ports]

        assert wait_for(lambda: sum(sum(t.values()) for t in totals()) >= len(published), 60, 0.5), totals()
        per_process = totals()
    finally:
        for p in procs:
            p.send_signal(signal.SIGTERM)
        for p in procs:
            p.wait(30)
    logs = [(tmp_path / f"svc-{i}.log").read_text(errors="replace") for i in range(2)]
    assert all(p.returncode == 0 for p in procs), [lg[-1500:] for lg in logs]
    # Both processes took messages, and every message was handled once in total: each
    # reading stored once (by one of them), each copy counted as a duplicate or rejected
    # as a replay, none lost.
    for kinds in per_process:
        assert sum(kinds.values()) > 0, per_process
    total = Counter()
    for kinds in per_process:
        total.update(kinds)
    assert total["waveform"] == want
    assert total["speed"] == speeds
    assert sum(total.values()) == len(published)
    assert measurement_count(url) == (want, want)
    store = Store.open(url)
    try:
        with store.session() as s:
            keys = s.execute(
                select(Alarm.machine_id, Alarm.ref, AlarmTransitionRow.transition, AlarmTransitionRow.at)
                .join(Alarm, Alarm.id == AlarmTransitionRow.alarm_id)
            ).all()
            alarm_refs = s.execute(select(Alarm.machine_id, Alarm.ref)).all()
    finally:
        store.close()
    assert any(m == "ef-2" for m, *_ in keys), "the run-up through the pedestal mode raised no alarm"
    # Not duplicated: no transition stored twice, no alarm stored or raised twice.
    assert len(keys) == len(set(keys)), Counter(keys).most_common(3)
    assert len(alarm_refs) == len(set(alarm_refs)), Counter(alarm_refs).most_common(3)
    raised = Counter((m, ref) for m, ref, name, _ in keys if name == "raised")
    assert raised and all(n == 1 for n in raised.values()), raised
    for lg in logs:
        assert '"service stopped"' in lg


@pytest.mark.postgres
def test_reading_stored_by_another_process_after_the_check_reruns_the_batch(pg_url: str) -> None:
    import psycopg

    m0, m1 = waveforms("ab-1", 2)
    a = Service(settings_for(pg_url, client_id="svc-a"), stale_check_s=0)
    b = Service(settings_for(pg_url, client_id="svc-b"), stale_check_s=0)
    schema = pg_url.rsplit("%3D", 1)[1]
    try:
        assert a.handle_batch([m0])[0].kind == "waveform"  # creates ab-1's detector-state row
        results: dict[str, str] = {}

        def run(name: str, svc: Service) -> None:
            results[name] = svc.handle_batch([m1])[0].kind

        # A third connection holds ab-1's detector-state row, so both services stop right
        # after their existence check (which found nothing) and wait for the row lock.
        with psycopg.connect(f"host=127.0.0.1 port=5432 user=postgres dbname=test "
                             f"options=-csearch_path={schema}") as holder:
            holder.execute("SELECT 1 FROM detector_state WHERE machine_id = 'ab-1' FOR UPDATE")
            threads = [threading.Thread(target=run, args=(n, s)) for n, s in (("a", a), ("b", b))]
            for t in threads:
                t.start()

            def waiting() -> int:
                with psycopg.connect("host=127.0.0.1 port=5432 user=postgres dbname=test",
                                     autocommit=True) as c:
                    return c.execute(
                        "SELECT count(*) FROM pg_stat_activity WHERE wait_event_type = 'Lock' "
                        "AND query ILIKE '%detector_state%'").fetchone()[0]

            assert wait_for(lambda: waiting() == 2, 20, 0.05), "the services did not reach the row lock"
            holder.rollback()  # the first service goes on and commits; the second then races
        for t in threads:
            t.join(20)
        reruns = [svc.metrics.registry.get_sample_value("whirlwatch_batch_reruns_total") for svc in (a, b)]
    finally:
        a.store.close()
        b.store.close()
    # One stored it; the other's insert found the row, rolled back and, run again, saw a
    # duplicate: one row, and the detector fed once.
    assert sorted(results.values()) == ["duplicate", "waveform"], results
    assert sorted(reruns) == [0.0, 1.0]
    assert measurement_count(pg_url) == (2, 2)
    assert stored_evaluator_state(pg_url, "ab-1") == straight_feed([m0, m1], "ab-1")


# ----------------------------------------------------------------------------- publishing


@pytest.mark.slow
def test_every_transition_is_published_and_a_clean_stop_flushes(
    fresh_mosquitto: PrivateBroker, tmp_path: Path
) -> None:
    from service_helpers import Recorder

    from monitor.store.reads import alarm_json

    url = sqlite(tmp_path, "store.sqlite")
    # The fan's run-up crosses its pedestal mode (resonance alarm, API 684 margin) and the
    # motor's last weeks carry a flat (stuck) sensor signal (sensor fault, common practice).
    msgs = traffic("ef-2", 0, 160) + traffic("bwm-1", 130, None)
    events = Recorder(fresh_mosquitto.host, fresh_mosquitto.port, "whirlwatch/+/alarms")
    proc = service_process(fresh_mosquitto.url, url, tmp_path, client_id="svc-pub")
    try:
        wait_started(tmp_path, "svc-pub")
        sender = threading.Thread(target=publish_many, args=(fresh_mosquitto, msgs))
        sender.start()
        store = Store.open(url)

        def transitions() -> int:
            with store.session() as s:
                return len(s.execute(select(AlarmTransitionRow.id)).all())

        # Stop while transitions are being produced: those published just before SIGTERM
        # sit in the outbound queue, which the clean stop must send before disconnecting.
        assert wait_for(lambda: transitions() > 0, 60, 0.02)
        store.close()
    finally:
        proc.send_signal(signal.SIGTERM)
        proc.wait(30)
    sender.join(60)
    log = (tmp_path / "svc-pub.log").read_text(errors="replace")
    assert proc.returncode == 0 and '"service stopped"' in log, log[-2000:]
    store = Store.open(url)
    try:
        with store.session() as s:
            stored = s.execute(select(Alarm, AlarmTransitionRow.transition)
                               .join(AlarmTransitionRow, Alarm.id == AlarmTransitionRow.alarm_id)).all()
            rest = {a.id: alarm_json(a) for a, _ in stored}
            want = Counter((a.id, name) for a, name in stored)
    finally:
        store.close()
    assert want
    # Nothing more can come (the service has disconnected); give the broker a moment.
    wait_for(lambda: len(events.json()) >= sum(want.values()), 5, 0.05)
    got = events.json()
    events.close()
    assert Counter((e["id"], e["transition"]) for e in got) == want
    for e in got:
        body = rest[e["id"]]
        assert set(body) | {"transition"} <= set(e), set(body) - set(e)
        assert (e["machine"], e["point"], e["kind"], e["subject"], e["raised_at"]) == (
            body["machine"], body["point"], body["kind"], body["subject"], body["raised_at"])
    status = Recorder(fresh_mosquitto.host, fresh_mosquitto.port, "whirlwatch/+/status")
    assert wait_for(lambda: bool(status.messages), 5, 0.05)
    retained = {json.loads(p)["machine"] for _, p, r in status.messages if r}
    status.close()
    # A retained status for every machine with an alarm (a late subscriber gets it at once).
    assert {body["machine"] for body in rest.values()} <= retained


def test_broker_redelivery_far_behind_its_stream_is_stored_not_dropped(tmp_path: Path) -> None:
    # MQTT 5.0 section 3.3.1.1 / 3.1.1 section 3.3.1.1: DUP marks a redelivery. A message
    # whose commit never happened (its process died) may come back after later readings
    # of the stream were stored elsewhere; at-least-once delivery (docs/mqtt.md, "Delivery semantics")
    # means it must still be stored, while a fresh publish that old is a replay.
    msgs = waveforms("ab-1", 6)
    old, newer = msgs[0], msgs[1:]
    url = sqlite(tmp_path, "redelivery.sqlite")
    svc = Service(settings_for(url), stale_check_s=0)
    try:
        gap = svc.limits.replay_window_s
        first_ts = decode_message(old[0], old[1], svc.registry, prefix="whirlwatch").ts
        last_ts = decode_message(newer[-1][0], newer[-1][1], svc.registry, prefix="whirlwatch").ts
        assert last_ts - first_ts > gap, "the sample stream must span more than the replay window"
        assert [o.kind for o in svc.handle_batch(newer)] == ["waveform"] * len(newer)
        fresh = svc.handle_batch([old])
        assert (fresh[0].kind, fresh[0].reason) == ("rejected", "ts_replayed")
        redelivered = svc.handle_batch([old], [True])
        assert [o.kind for o in redelivered] == ["waveform"]
        assert [o.kind for o in svc.handle_batch([old], [True])] == ["duplicate"]
    finally:
        svc.store.close()
    assert measurement_count(url) == (6, 6)


def test_margin_table_is_kept_with_each_machines_newest_reading_of_a_batch(tmp_path: Path) -> None:
    # The dashboard reads the margin table from a machine's newest reading; the service
    # keeps it there and leaves it out of the older readings of the same batch.
    from monitor.store.models import Measurement

    msgs = waveforms("ab-1", 4)
    url = sqlite(tmp_path, "margins.sqlite")
    svc = Service(settings_for(url), stale_check_s=0)
    try:
        assert [o.kind for o in svc.handle_batch(msgs[:3])] == ["waveform"] * 3
        assert [o.kind for o in svc.handle_batch(msgs[3:])] == ["waveform"]
    finally:
        svc.store.close()
    store = Store.open(url)
    try:
        with store.session() as s:
            rows = s.execute(select(Measurement.ts, Measurement.evaluation).order_by(Measurement.ts)).all()
    finally:
        store.close()
    has_margins = ["margins" in ev for _, ev in rows]
    assert has_margins == [False, False, True, True]
    # the kept table is the full mode x excitation table: 1 mode x (1x, 2x, 13x) for ab-1
    assert len(rows[-1][1]["margins"]) == 3


def test_acknowledgement_from_the_dashboard_reaches_the_service_and_is_published(tmp_path: Path) -> None:
    # docs/alarms.md (lifecycle): an alarm is acknowledged by a named user (here through the
    # store function the dashboard calls); the service applies it to its detector and
    # publishes the transition once, and acknowledging does not clear the alarm.
    from monitor.store.models import Alarm
    from monitor.store.writes import acknowledge_alarm

    msgs = traffic("bwm-1")  # the motor whose sensor fails (sample_streams/README.md)
    url = sqlite(tmp_path, "ack.sqlite")
    svc = Service(settings_for(url), stale_check_s=0)
    try:
        raised_at = None
        for i in range(0, len(msgs), 8):
            svc.handle_batch(msgs[i:i + 8])
            with Store.open(url).session() as s:
                active = s.execute(select(Alarm).where(Alarm.state == "active")).scalars().first()
                if active is not None:
                    raised_at, alarm_id = i + 8, active.id
                    break
        assert raised_at is not None, "the failing sensor raised no alarm"
        store = Store.open(url)
        try:
            with store.transaction() as s:
                acknowledge_alarm(s, alarm_id, "maria", "cable connector ordered")
        finally:
            store.close()
        rest = msgs[raised_at:raised_at + 8]
        assert rest, "the stream ended before a further batch"
        outs = svc.handle_batch(rest)
        events = [e for o in outs for e in o.events if e.get("transition") == "acknowledged"]
        assert len(events) == 1 and events[0]["acknowledged_by"] == "maria"
        assert events[0]["state"] == "acknowledged" and events[0]["cleared_at"] is None
        later = svc.handle_batch(msgs[raised_at + 8:raised_at + 16])
        assert not [e for o in later for e in o.events if e.get("transition") == "acknowledged"]
        ref = events[0]["ref"]
        assert any(a["id"] == ref and a["state"] == "acknowledged"
                   for a in svc.detector("bwm-1").active_alarms())
    finally:
        svc.store.close()
