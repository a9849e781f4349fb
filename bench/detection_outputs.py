"""Every detection output over the sample plant and a wandering-speed bench machine, as one
JSON file, for checking that a change to detection (a speed-up, say) leaves its results as
they were:

    git archive HEAD monitor | tar -x -C /tmp/before
    PYTHONPATH=/tmp/before python bench/detection_outputs.py /tmp/before.json
    python bench/detection_outputs.py /tmp/after.json
    cmp /tmp/before.json /tmp/after.json

Covers evaluations with their margin tables, speed messages, a snapshot and restore midway,
a baseline restart, a stale check, spikes injected every 97th reading of the bench machine,
and the final snapshots.
"""

from __future__ import annotations

import glob
import json
import math
import sys
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np

from monitor.analysis.waveform import analyse_waveform
from monitor.detection.evaluator import MachineEvaluator
from monitor.detection.stored_state import evaluator_from_state, stored_state
from monitor.io.ingest import decode_message
from monitor.io.replay import load_streams
from monitor.io.streams import parse_ts
from monitor.model.readings import Waveform
from monitor.model.registry_file import load_registry

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "bench"))
import bench_detection  # noqa: E402


def _plain(obj: Any) -> Any:
    return json.loads(json.dumps(obj, default=str))


def plant_outputs() -> list[Any]:
    """The sample plant's streams in time order, one evaluator per machine as the service
    keeps them (monitor/service/states.py), restored midway from their stored states."""
    out: list[Any] = []
    reg = load_registry(ROOT / "sample_streams" / "plant.toml")
    evaluators = {m.id: MachineEvaluator(m) for m in reg.machines}
    msgs = load_streams(sorted(glob.glob(str(ROOT / "sample_streams" / "*.jsonl"))))
    for k, (topic, payload) in enumerate(msgs):
        r = decode_message(topic, json.dumps(payload).encode(), reg, now=parse_ts(payload["ts"]) + 1.0)
        if isinstance(r, Waveform):
            m = reg.machine(r.machine)
            try:
                a = analyse_waveform(r, m, m.point(r.point))
            except ValueError:
                a = None
            ev = evaluators[r.machine].evaluate(a, r)
            doc = ev.to_json()
            nearest = ev.nearest_margin()
            doc["nearest"] = None if nearest is None else nearest.to_json()
            out.append(doc)
        else:
            out.append([t.to_json() for t in evaluators[r.machine].observe_speed(r)])
        if k == 500:
            evaluators = {mid: evaluator_from_state(reg.machine(mid), _plain(stored_state(e, 0)))[0]
                          for mid, e in evaluators.items()}
        if k == 700:
            e = evaluators["rwp-1"]
            e.restart_baseline(e.machine.points[0].id, 0.0)
    out.append(_plain({"machines": {mid: e.snapshot() for mid, e in evaluators.items()}}))
    out.append([t.to_json() for e in evaluators.values() for t in e.check_stale(2e9)])
    return out


def bench_machine_outputs() -> list[Any]:
    """The detection bench's machine with a speed that wanders after 150 readings (speed-band
    restarts, approach forecasts) and spikes every 97th reading."""
    out: list[Any] = []
    rng = np.random.default_rng(3)
    m = bench_detection._machine()
    p = m.points[0]
    ev = MachineEvaluator(m)
    for i in range(400):
        speed = 24.6 * (1.0 + 0.15 * math.sin(i / 25.0)) if i > 150 else 24.6
        w = bench_detection._waveform(i, speed, rng)
        if i % 97 == 0:
            w = replace(w, samples=np.where(np.arange(w.samples.size) % 300 == 0, 80.0, w.samples))
        out.append(ev.evaluate(analyse_waveform(w, m, p), w).to_json())
        if i == 250:
            ev = MachineEvaluator.restore(m, _plain(ev.snapshot()))
    out.append(_plain(ev.snapshot()))
    return out


def main(path: str) -> None:
    out = _plain(plant_outputs() + bench_machine_outputs())
    with open(path, "w", encoding="utf-8") as fh:
        json.dump(out, fh, sort_keys=True)
    print(f"{len(out)} records written to {path}")


if __name__ == "__main__":
    main(sys.argv[1])
