"""The service's Prometheus metrics and health view, read over HTTP from `whirlwatch run`.

The expected figures are what the test itself published (so many readings, so many bad
messages of each kind) and what the store holds afterwards; the text format is parsed with
prometheus_client's own parser (the Prometheus exposition format).
"""

from __future__ import annotations

import json
import signal
import subprocess
import sys
import time
import urllib.error
import urllib.request
from collections import Counter
from pathlib import Path

import pytest
from broker import PrivateBroker, free_port, publish_many
from prometheus_client.parser import text_string_to_metric_families
from service_helpers import ROOT, plant_store, traffic, wait_for, wait_started, waveform_keys
from sqlalchemy import select

from monitor.store import Store
from monitor.store.models import Alarm, AlarmTransitionRow

pytestmark = [pytest.mark.broker, pytest.mark.slow]


def get(port: int, path: str) -> tuple[int, str, str]:
    """(status, content type, body) of GET ``path``."""
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}{path}", timeout=5) as r:
            return r.status, r.headers["Content-Type"], r.read().decode()
    except urllib.error.HTTPError as exc:
        return exc.code, exc.headers["Content-Type"], exc.read().decode()


def samples(port: int) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    status, ctype, text = get(port, "/metrics")
    assert status == 200 and ctype.startswith("text/plain"), (status, ctype)
    return {(s.name, tuple(sorted(s.labels.items()))): s.value
            for fam in text_string_to_metric_families(text) for s in fam.samples}


def by_label(metrics: dict, name: str, label: str) -> dict[str, float]:
    return {dict(labels)[label]: v for (n, labels), v in metrics.items() if n == name}


def bad_messages(good: bytes) -> list[tuple[str, bytes, str]]:
    """(topic, payload, reason of docs/mqtt.md)."""
    return [
        ("whirlwatch/ab-1/nde-v/waveform", b"{ts: 1", "not_json"),
        ("whirlwatch/ab-1/nde-v/waveform", b"not json either", "not_json"),
        ("whirlwatch/zz-9/de-h/waveform", good, "unknown_machine"),
        ("whirlwatch/ef-2/speed", json.dumps({"ts": time.time(), "rpm": -5}).encode(), "speed_negative"),
    ]


def test_metrics_and_health_of_a_running_service(fresh_mosquitto: PrivateBroker, tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path / 'store.sqlite'}"
    plant_store(url)
    # The fan's run-up through its pedestal mode raises a resonance alarm (API 684 margin).
    good = traffic("ef-2", 0, 60) + traffic("ab-1", 0, 20)
    bad = bad_messages(next(p for t, p in good if t.endswith("/waveform")))
    published = good + [(t, p) for t, p, _ in bad]
    n_waves = len(waveform_keys(good))
    n_speeds = sum(1 for t, _ in good if t.endswith("/speed"))
    port = free_port()
    cmd = [sys.executable, "-c", "from monitor.cli import main; main()", "run", "--broker", fresh_mosquitto.url,
           "--database", url, "--client-id", "svc-metrics", "--metrics", f"127.0.0.1:{port}"]
    with open(tmp_path / "svc-metrics.log", "ab") as log:
        proc = subprocess.Popen(cmd, stdout=log, stderr=subprocess.STDOUT, cwd=ROOT)
    try:
        wait_started(tmp_path, "svc-metrics")
        publish_many(fresh_mosquitto, published)

        def handled() -> float:
            return sum(by_label(samples(port), "whirlwatch_messages_total", "kind").values())

        assert wait_for(lambda: handled() >= len(published), 45, 0.2), handled()
        store = Store.open(url)
        try:
            with store.session() as s:
                by_state = Counter(s.scalars(select(Alarm.state)))
                n_transitions = len(s.execute(select(AlarmTransitionRow.id)).all())
        finally:
            store.close()
        assert by_state, "no alarm was raised"
        # Alarms by state are refreshed by the service's periodic job (every 5 s).
        assert wait_for(lambda: all(
            by_label(samples(port), "whirlwatch_alarms", "state").get(st) == n for st, n in by_state.items()), 12, 0.5)
        m = samples(port)
        status, ctype, body = get(port, "/healthz")
        missing = get(port, "/nowhere")[0]
    finally:
        proc.send_signal(signal.SIGTERM)
        proc.wait(30)
    assert proc.returncode == 0, (tmp_path / "svc-metrics.log").read_text(errors="replace")[-2000:]

    kinds = by_label(m, "whirlwatch_messages_total", "kind")
    assert kinds.get("waveform") == n_waves
    assert kinds.get("speed") == n_speeds
    assert kinds.get("rejected") == len(bad)
    assert by_label(m, "whirlwatch_rejected_total", "reason") == dict(Counter(r for *_, r in bad))
    # Processing time: one observation per message; cumulative buckets up to +Inf = count.
    count = m[("whirlwatch_processing_seconds_count", ())]
    assert count == len(published)
    assert m[("whirlwatch_processing_seconds_sum", ())] > 0
    buckets = sorted(((float(dict(lb)["le"]), v) for (n, lb), v in m.items()
                      if n == "whirlwatch_processing_seconds_bucket"), key=lambda x: x[0])
    assert [v for _, v in buckets] == sorted(v for _, v in buckets) and buckets[-1] == (float("inf"), count)
    # Everything is acknowledged by now, so nothing is in flight.
    assert m[("whirlwatch_in_flight", ())] == 0
    states = by_label(m, "whirlwatch_alarms", "state")
    assert {st: states[st] for st in by_state} == dict(by_state)
    assert sum(by_label(m, "whirlwatch_alarm_transitions_total", "transition").values()) == n_transitions

    assert status == 200 and ctype == "application/json"
    health = json.loads(body)
    assert health["ok"] is True and health["connected"] is True
    assert health["received"] == health["acked"] == len(published)
    assert health["in_flight"] == 0
    assert health["rejected"] == dict(Counter(r for *_, r in bad))
    assert missing == 404
