"""A stale-stream alarm is a transition like any other: counted in
``whirlwatch_alarm_transitions_total`` and logged as "alarm transition", as those of the
readings are (docs/alarms.md, "sensor_fault", check `stale`; docs/service.md).

The stream: the sample motor's readings (sample_streams/), then the service's clock ten
days after the last one, far beyond `stale_intervals` (3) reading intervals.
"""

from __future__ import annotations

import json
import logging
from pathlib import Path

from service_helpers import offline_service, plant_store, traffic

from monitor.io.streams import parse_ts


def transitions_counted(svc) -> dict[str, float]:
    get = svc.metrics.registry.get_sample_value
    return {name: get("whirlwatch_alarm_transitions_total", {"transition": name}) or 0.0
            for name in ("raised", "cleared")}


def test_stale_transitions_are_counted_and_logged(tmp_path: Path, caplog) -> None:
    url = f"sqlite:///{tmp_path / 'store.sqlite'}"
    plant_store(url)
    readings = [m for m in traffic("bwm-1") if m[0].endswith("/waveform")][:-6]  # before it stuck
    last = max(parse_ts(json.loads(p)["ts"]) for _, p in readings)
    now = [last + 60.0]
    svc = offline_service(url, clock=lambda: now[0])
    try:
        svc.handle_batch(readings)
        before = transitions_counted(svc)
        now[0] = last + 10 * 86400.0
        with caplog.at_level(logging.INFO, logger="whirlwatch.service"):
            events = svc.check_stale()
    finally:
        svc.store.close()
    stale = [e for e in events if e["subject"] == "stale"]
    assert stale and all(e["transition"] == "raised" and e["kind"] == "sensor_fault" for e in stale)
    after = transitions_counted(svc)
    assert after["raised"] - before["raised"] == len(events)
    logged = [r for r in caplog.records if r.getMessage() == "alarm transition" and r.subject == "stale"]
    assert len(logged) == len(stale)
    assert {(r.machine, r.kind, r.transition) for r in logged} == {("bwm-1", "sensor_fault", "raised")}
