"""The soak's traffic: a month of the sample plant, compressed, as MQTT messages.

The sample streams (``sample_streams/``, six weeks of five machines made by the project's
simulator, see its README) are played :data:`PASSES` times back to back, each pass's six
weeks retimed into an equal share of :data:`SPAN_S` (29 days, inside the ingest age limit
of 30 days) ending a minute before the traffic is built. Every pass starts from the
machines' healthy state, as after maintenance: the growth, resonance and sensor-fault
alarms a pass raises clear at the start of the next one, so the month raises and clears
alarms several times, fills every trend window and learns every baseline.

Within a stream the messages stay in time order; a speed reading keeps the instant of the
waveform it belongs to; reading ids get the pass number so each reading keeps its own id.

The soak's registry is the sample plant's with one setting added: ``stale_intervals`` so
large that no stream is ever stale. The stale check compares a stream's last reading with
the wall clock, and a month replayed in minutes lags the wall clock by up to the whole
month: the check would raise at whatever instants its 30 s timer happened to fire, which
no second run of the same messages could repeat.
"""

from __future__ import annotations

import dataclasses
import json
import time
from dataclasses import dataclass
from pathlib import Path

from service_helpers import PLANT, SAMPLES

from monitor.io.replay import load_streams
from monitor.io.streams import parse_ts
from monitor.model.registry import Registry
from monitor.model.registry_file import dump_registry, load_registry
from monitor.model.timefmt import iso_utc

#: Passes of the six-week sample story in the month.
PASSES = 5
#: Time the month's readings span, s (the ingest age limit is 30 days).
SPAN_S = 29 * 86400.0
#: How long before the traffic is built its last reading is stamped, s.
END_BEFORE_NOW_S = 60.0
#: Expected intervals without a reading before a stream counts as stale, in the soak's
#: registry: with the shortest compressed interval (about 0.55 s, the fan's coast-down)
#: this is some 64 days, longer than the month.
NEVER_STALE_INTERVALS = 1e7


@dataclass(frozen=True)
class Reading:
    """One message of the month: its topic, payload bytes and the stored row it makes."""

    topic: str
    payload: bytes
    machine: str
    point: str | None  # None for a speed reading
    ts_ms: int  # the reading's instant, epoch milliseconds

    @property
    def key(self) -> tuple[str, str | None, int]:
        """(machine, point or None, epoch ms): the idempotence key of its stored row."""
        return (self.machine, self.point, self.ts_ms)


def plant_month(end_ts: float | None = None) -> list[Reading]:
    """The compressed month, merged across machines in time order (see the module)."""
    stories = load_streams(sorted(SAMPLES.glob("*.jsonl")))
    times = [parse_ts(p["ts"]) for _, p in stories]
    first, last = min(times), max(times)
    end = (time.time() - END_BEFORE_NOW_S) if end_ts is None else end_ts
    start = end - SPAN_S
    share = SPAN_S / PASSES
    # The story fills its share up to one typical gap before the next pass begins.
    scale = share * (1.0 - 1.0 / len(stories)) / (last - first)
    out: list[Reading] = []
    for k in range(PASSES):
        for (topic, payload), t in zip(stories, times, strict=True):
            body = dict(payload)
            body["ts"] = iso_utc(start + k * share + (t - first) * scale)
            if "id" in body:
                body["id"] = f"{body['id']}-p{k + 1}"
            parts = topic.split("/")
            out.append(Reading(
                topic=topic,
                payload=json.dumps(body, separators=(",", ":")).encode(),
                machine=parts[1],
                point=parts[2] if parts[-1] == "waveform" else None,
                ts_ms=round(parse_ts(body["ts"]) * 1000),
            ))
    return out


def soak_registry() -> Registry:
    """The sample plant with stale checks out of reach (see the module docstring)."""
    plant = load_registry(PLANT)
    return Registry(machines=tuple(
        dataclasses.replace(m, settings={**m.settings, "stale_intervals": NEVER_STALE_INTERVALS})
        for m in plant.machines))


def write_soak_registry(path: Path) -> Path:
    """The soak's registry as a TOML file (the service's ``--machines`` file)."""
    path.write_text("# The sample plant for the soak (tests/soak_month.py).\n"
                    + dump_registry(soak_registry()), encoding="utf-8")
    return path
