"""The service reading a stream file instead of a broker (monitor/io/source.py).

The source interface is what the service depends on; a stream file is its second real
implementation. Delivery contract (docs/mqtt.md): every message handed over once, in
order, and acknowledged after its commit; each reading stored once and fed to the
detector once, so the detector state is that of a straight feed through the pure core.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from service_helpers import (
    measurement_count,
    plant_store,
    stored_evaluator_state,
    straight_feed,
    traffic,
    wait_for,
    waveform_keys,
)
from sqlalchemy import select

from monitor.config import load_settings
from monitor.io.source import StreamFileSource
from monitor.io.streams import write_stream
from monitor.service.service import Service, ServiceError
from monitor.store import Store
from monitor.store.models import DeadLetter


def settings_for(url: str):
    # No broker: the URL is never dialled when a source is given.
    return load_settings(None, env={}, overrides={
        "broker.url": "mqtt://127.0.0.1:1", "database.url": url, "broker.client_id": "svc-file"})


@pytest.fixture()
def sqlite_url(tmp_path: Path) -> str:
    url = f"sqlite:///{tmp_path / 'store.sqlite'}"
    plant_store(url)
    return url


def stream_file(path: Path, messages: list[tuple[str, bytes]]) -> Path:
    write_stream(path, [(t, json.loads(p)) for t, p in messages])
    return path




def test_a_stream_file_is_stored_once_and_fed_once_in_order(sqlite_url: str, tmp_path: Path) -> None:
    # Two readings a day for 25 days: all within the service's 30-day age limit.
    messages = [m for m in traffic("ab-1", 0, 50) if m[0].endswith("/waveform")]
    source = StreamFileSource(stream_file(tmp_path / "ab-1.jsonl", messages))
    svc = Service(settings_for(sqlite_url), source=source, stale_check_s=0, max_batch=16)
    svc.start()
    try:
        assert source.wait_done(120), "the file was not worked through"
        health = svc.health()
        assert wait_for(lambda: svc.readiness()["ready"], 10), svc.readiness()
    finally:
        svc.stop()
    # Every message handed over once and acknowledged after its commit; none held.
    assert (source.stats.received, source.stats.acked, source.stats.in_flight) == (50, 50, 0)
    assert health["connected"] and health["backlog"] == 0 and health["ok"], health
    # 50 messages in batches of at most 16: four transactions.
    assert svc.metrics.registry.get_sample_value("whirlwatch_batch_size_count") == 4
    assert len(waveform_keys(messages)) == 50
    assert measurement_count(sqlite_url) == (50, 50)
    assert stored_evaluator_state(sqlite_url, "ab-1") == straight_feed(messages, "ab-1")


def test_a_malformed_line_is_skipped_and_a_bad_message_kept_as_a_dead_letter(
    sqlite_url: str, tmp_path: Path
) -> None:
    good = [m for m in traffic("ab-1", 0, 8) if m[0].endswith("/waveform")][:2]
    path = stream_file(tmp_path / "mixed.jsonl", [
        good[0], ("whirlwatch/no-such-machine/de-h/waveform", good[1][1]), good[1]])
    with path.open("a", encoding="utf-8") as fh:
        fh.write("{not json\n")
    source = StreamFileSource(path)
    svc = Service(settings_for(sqlite_url), source=source, stale_check_s=0)
    svc.start()
    try:
        assert source.wait_done(60)
    finally:
        svc.stop()
    assert (source.stats.received, source.stats.acked, source.stats.malformed) == (3, 3, 1)
    assert measurement_count(sqlite_url) == (2, 2)
    store = Store.open(sqlite_url)
    try:
        with store.session() as s:
            letters = list(s.scalars(select(DeadLetter)))
    finally:
        store.close()
    assert [(d.topic, d.reason) for d in letters] == [("whirlwatch/no-such-machine/de-h/waveform", "unknown_machine")]


def test_an_unreadable_file_stops_the_start_with_its_name(sqlite_url: str, tmp_path: Path) -> None:
    missing = tmp_path / "nowhere.jsonl"
    svc = Service(settings_for(sqlite_url), source=StreamFileSource(missing), stale_check_s=0)
    try:
        with pytest.raises(ServiceError, match="nowhere.jsonl"):
            svc.start(wait_s=5)
    finally:
        svc.stop()
