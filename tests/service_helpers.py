"""Helpers for the service tests: a store with the sample plant, retimed sample traffic,
a service without a broker, the detector state stored and its straight-through
reference, a subscriber that records what the service publishes, and the
service as a subprocess."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Sequence
from pathlib import Path

import paho.mqtt.client as paho
from broker import wait_until
from contracts import check_message
from paho.mqtt.enums import CallbackAPIVersion
from sqlalchemy import func, select

from monitor.analysis.waveform import analyse_waveform
from monitor.config import load_settings
from monitor.detection.evaluator import MachineEvaluator
from monitor.io.ingest import decode_message
from monitor.io.replay import load_streams, retimed
from monitor.io.streams import reading_message
from monitor.model.readings import SpeedReading, Waveform
from monitor.model.registry_file import load_registry
from monitor.service.service import Service
from monitor.store import Store, import_registry, upgrade
from monitor.store.models import DetectorState, Measurement

ROOT = Path(__file__).resolve().parent.parent
SAMPLES = ROOT / "sample_streams"
PLANT = SAMPLES / "plant.toml"


def plant_store(url: str) -> None:
    """Create the schema at ``url`` and import the sample plant's registry."""
    upgrade(url)
    store = Store.open(url)
    try:
        with store.transaction() as s:
            import_registry(s, load_registry(PLANT))
    finally:
        store.close()


def traffic(name: str, start: int = 0, stop: int | None = None, *, end_ts: float | None = None
            ) -> list[tuple[str, bytes]]:
    """Lines ``start:stop`` of one sample stream, timestamps moved so the last is ``end_ts``
    (now), as ``(topic, payload bytes)``."""
    msgs = load_streams([SAMPLES / f"{name}.jsonl"])[start:stop]
    plan, _ = retimed(msgs, time.time() if end_ts is None else end_ts)
    return [(t, json.dumps(p, separators=(",", ":")).encode()) for _, (t, p) in plan]


def offline_service(url: str, clock: Callable[[], float] | None = None, config: Path | None = None,
                    **settings: object) -> Service:
    """A service on the store at ``url`` that is never started: no broker, nothing
    published; readings go in through ``handle_batch`` (and their transitions to the
    notifier, if any, through ``announce``). ``config``: a service file read first (the
    notification rules live there); ``settings`` are dotted settings names with ``_`` for
    ``.`` (``spectra_snapshot_interval_s=300``); retention is off."""
    overrides: dict[str, object] = {"broker.url": "mqtt://127.0.0.1:1", "database.url": url,
                                    "retention.enabled": False}
    overrides.update({k.replace("_", ".", 1): v for k, v in settings.items()})
    return Service(load_settings(config, env={}, overrides=overrides), clock=clock, stale_check_s=0)


def message(reading: Waveform | SpeedReading) -> tuple[str, bytes]:
    """The MQTT message (topic, payload bytes) of a reading, as a sensor would send it."""
    topic, payload = reading_message(reading)
    return topic, json.dumps(payload, separators=(",", ":")).encode()


def waveform_keys(messages: list[tuple[str, bytes]]) -> set[tuple[str, str, str]]:
    """(machine, point, ts text) of every waveform in ``messages``."""
    out = set()
    for topic, payload in messages:
        parts = topic.split("/")
        if parts[-1] == "waveform":
            out.add((parts[1], parts[2], json.loads(payload)["ts"]))
    return out


def measurement_count(url: str) -> tuple[int, int]:
    """(rows, distinct (machine, point, ts)) in the measurements table."""
    store = Store.open(url)
    try:
        with store.session() as s:
            rows = s.scalar(select(func.count()).select_from(Measurement))
            distinct = s.scalar(
                select(func.count()).select_from(
                    select(Measurement.machine_id, Measurement.point_id, Measurement.ts).distinct().subquery()
                )
            )
        return int(rows or 0), int(distinct or 0)
    finally:
        store.close()


def wait_for(predicate: Callable[[], bool], timeout_s: float, poll_s: float = 0.2) -> bool:
    """:func:`broker.wait_until` polling less often (a service test's predicate reads a database)."""
    return wait_until(predicate, timeout_s, poll_s)


class Recorder:
    """Subscribes to ``topic`` (QoS 1) and keeps every message received; each alarm event
    and status is checked against its published schema (tests/contracts.py), and
    :meth:`json` and :meth:`close` fail the test if any was not of it."""

    def __init__(self, host: str, port: int, topic: str) -> None:
        self.messages: list[tuple[str, bytes, bool]] = []
        self.off_contract: list[str] = []
        self._lock = threading.Lock()
        self._ready = threading.Event()
        self.client = paho.Client(CallbackAPIVersion.VERSION2, protocol=paho.MQTTv5)
        self.client.on_connect = lambda c, *_: c.subscribe(topic, qos=1)
        self.client.on_subscribe = lambda *_: self._ready.set()
        self.client.on_message = self._on_message
        self.client.connect(host, port)
        self.client.loop_start()
        if not self._ready.wait(10):
            raise RuntimeError("the recorder could not subscribe")

    def _on_message(self, _c, _u, msg) -> None:
        try:
            check_message(msg.topic, bytes(msg.payload))
            wrong = None
        except (AssertionError, ValueError) as exc:
            wrong = f"{msg.topic}: {exc}"
        with self._lock:
            self.messages.append((msg.topic, bytes(msg.payload), bool(msg.retain)))
            if wrong:
                self.off_contract.append(wrong)

    def json(self) -> list[dict]:
        with self._lock:
            assert not self.off_contract, self.off_contract[:3]
            return [json.loads(p) for _, p, _ in self.messages if p]

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()
        assert not self.off_contract, self.off_contract[:3]


def service_process(broker_url: str, db_url: str, workdir: Path, *, client_id: str = "svc",
                    group: str | None = None, extra: Sequence[str] = ()) -> subprocess.Popen:
    """``whirlwatch run`` as a child process (its log in ``workdir/{client_id}.log``);
    ``extra`` are further options of ``run`` (``--machines``, ``--metrics``, ...)."""
    cmd = [sys.executable, "-c", "from monitor.cli import main; main()", "run",
           "--broker", broker_url, "--database", db_url, "--client-id", client_id]
    if group:
        cmd += ["--shared-group", group]
    cmd += list(extra)
    env = dict(os.environ, WHIRLWATCH_SERVICE_DATA_DIR=str(workdir))
    log = open(workdir / f"{client_id}.log", "ab")  # noqa: SIM115 (the child keeps it)
    try:
        return subprocess.Popen(cmd, stdout=log, stderr=subprocess.STDOUT, env=env, cwd=ROOT)
    finally:
        log.close()


def wait_started(workdir: Path, client_id: str, count: int = 1, timeout_s: float = 30.0) -> None:
    """Until the child's log shows ``count`` 'service started' lines."""
    path = workdir / f"{client_id}.log"

    def started() -> bool:
        try:
            return path.read_text(errors="replace").count('"service started"') >= count
        except OSError:
            return False

    if not wait_for(started, timeout_s, 0.05):
        tail = path.read_text(errors="replace")[-2000:] if path.exists() else "(no log)"
        raise RuntimeError(f"the service did not start: {tail}")


def stored_evaluator_state(url: str, machine: str) -> dict:
    """The evaluator part of ``machine``'s detector state as the service stored it."""
    store = Store.open(url)
    try:
        with store.session() as s:
            state = s.scalar(select(DetectorState.state).where(DetectorState.machine_id == machine))
    finally:
        store.close()
    assert isinstance(state, dict) and "evaluator" in state, f"no detector state stored for {machine}"
    return state["evaluator"]


def straight_feed(messages: list[tuple[str, bytes]], machine: str) -> dict:
    """The detector state after each distinct reading was evaluated exactly once, in order,
    straight through the pure core (no service, no store): the reference for 'fed once'."""
    registry = load_registry(PLANT)
    spec = registry.machine(machine)
    ev = MachineEvaluator(spec)
    seen: set[tuple[str, bytes]] = set()
    for topic, payload in messages:
        if (topic, payload) in seen:
            continue
        seen.add((topic, payload))
        w = decode_message(topic, payload, registry, prefix="whirlwatch")
        ev.evaluate(analyse_waveform(w, spec, spec.point(w.point)), w)
    return ev.snapshot()

