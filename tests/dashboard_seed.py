"""Seed a store for dashboard tests and the benchmark through the service's own batch path.

The plant is invented ("Harbour Mill"); its numbers are demo data, never expected values.

The readings of the first ``detected`` machines are simulated (monitor.sim.simulate), sent
as the MQTT payloads of docs/mqtt.md (monitor.io.streams) and handed to
``Service.handle_batch`` without a broker, as tests/test_service_batches.py does: decoded,
analysed, evaluated and written by the service's one batch writer, with the alarm
transitions the detector raised and their evidence spectra. The dashboard is therefore
tested on exactly the rows the service writes.

The other machines only make the plant large (the statement-count test, the benchmark):
their rows are copies, made in SQL (``INSERT ... SELECT``), of the rows the service stored
for a detected machine, with the machine id replaced (the evaluation JSON inside still
names the machine it was made for). No row is shaped here. They carry the measurements and
each point's newest spectra and the service's stored status (monitor/store/statuses.py),
no alarms (the status's alarm count set to none; its body still names the machine and the
alarms it was made for).
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import functools
import json

import numpy as np
from sqlalchemy import Table, delete, func, insert, literal, select
from sqlalchemy.orm import Session

from monitor.config import load_settings
from monitor.io.streams import reading_message
from monitor.model.registry import Machine as RegMachine
from monitor.model.registry import Mode as RegMode
from monitor.model.registry import Point as RegPoint
from monitor.model.registry import Registry
from monitor.service.items import OutcomeKind
from monitor.service.service import Service
from monitor.sim.simulate import MachineModel, ModalMode, simulate_reading
from monitor.store.auth import create_user
from monitor.store.db import make_engine, session_factory
from monitor.store.migrate import upgrade_engine
from monitor.store.models import (
    Machine,
    MachineStatus,
    Measurement,
    MeasurementPoint,
    Mode,
    SpectrumSnapshot,
)
from monitor.store.registry_sync import import_registry
from monitor.store.statuses import NORMAL_RANK

T_END = dt.datetime(2026, 3, 10, 12, 0, tzinfo=dt.UTC)
STEP = dt.timedelta(minutes=10)
PASSWORDS = {"ada": "admin-pass-1", "eng": "engineer-pass-1", "vic": "viewer-pass-1"}
ROLES = {"ada": "admin", "eng": "engineer", "vic": "viewer"}
POINTS = ("de-h", "nde-v")
ORDERS = (1.0, 2.0, 7.0)
FS_HZ = 2048.0
BLOCK = 4096
#: Messages per handle_batch call (the service's own largest batch).
BATCH = 32


def plant(machines: int, names: dict[int, str] | None = None) -> Registry:
    """The invented plant: dryer fans with two points and two modes each."""
    return Registry(machines=tuple(
        RegMachine(
            id=f"fan-{i:03d}", name=(names or {}).get(i, f"Dryer fan {i}"), location=f"Hall {i % 4 + 1}",
            machine_class="group2/flexible", speed_range_rpm=(300.0, 1500.0), excitation_orders=ORDERS,
            points=tuple(RegPoint(id=pid, direction=("horizontal", "vertical")[j], quantity="acceleration",
                                  unit="m/s^2", fs_hz=FS_HZ) for j, pid in enumerate(POINTS)),
            modes=(RegMode(name="pedestal rocking", frequency_hz=20.0 + 0.5 * (i % 5), damping_ratio=0.04,
                           source="impact test", date=dt.date(2026, 1, 15)),
                   RegMode(name="base plate", frequency_hz=150.0, amplification_factor=8.0,
                           source="design calculation")),
        ) for i in range(machines)))


def _speed(i: int, k: np.ndarray) -> np.ndarray:
    # Every third fan runs close to its pedestal mode (1x inside the required margin).
    return (16.6 if i % 3 == 2 else 14.0) + 0.3 * np.sin(k / 8.0) + 0.05 * i


@functools.lru_cache(maxsize=4)
def _messages(detected: int, readings_per_point: int) -> tuple[tuple[str, bytes], ...]:
    """The waveform messages (topic, payload bytes) of the first ``detected`` fans, in time
    order, every ``STEP`` up to ``T_END``; simulated once per process (deterministic)."""
    registry = plant(detected)
    k = np.arange(readings_per_point)
    models = [MachineModel(
        machine_id=rm.id,
        modes=tuple(ModalMode(frequency_hz=mo.frequency_hz, damping_ratio=0.04 if mo.damping_ratio else 0.06,
                              modal_mass_kg=150.0, name=mo.name) for mo in rm.modes),
        unbalance_kg_m=2e-3, misalignment_n=40.0, pass_orders=(7.0,), pass_force_n=25.0,
        sensor_noise_m_s2=0.02) for rm in registry.machines]
    out = []
    for x in range(readings_per_point):
        ts = (T_END - STEP * (readings_per_point - 1 - x)).timestamp()
        for i, (rm, model) in enumerate(zip(registry.machines, models, strict=True)):
            speed = float(_speed(i, k)[x])
            for j, point in enumerate(rm.points):
                # Unbalance grows slowly on the drive end, so growth trends have a slope.
                grown = dataclasses.replace(model, unbalance_kg_m=model.unbalance_kg_m * (1 + 0.01 * x * (j == 0)))
                w = simulate_reading(grown, point.id, speed_hz=speed, ts=ts, fs_hz=FS_HZ, n_samples=BLOCK,
                                     seed=1000 * i + 10 * x + j, include_speed=True, reading_id=f"{rm.id}-{point.id}-{x}")
                topic, payload = reading_message(w)
                out.append((topic, json.dumps(payload, separators=(",", ":")).encode()))
    return tuple(out)


def seed(url: str, machines: int = 3, readings_per_point: int = 50, *, names: dict[int, str] | None = None,
         detected: int = 3) -> None:
    """Create the schema and an invented plant of ``machines`` machines, two points each,
    ``readings_per_point`` readings every 10 minutes up to ``T_END``: those of the first
    ``detected`` machines through the service, the others copied from them."""
    engine = make_engine(url)
    upgrade_engine(engine)
    registry = plant(machines, names)
    with session_factory(engine)() as s:
        for n, role in ROLES.items():
            create_user(s, n, PASSWORDS[n], role)
        import_registry(s, registry)
        s.commit()
    detected = min(detected, machines)
    _through_service(url, _messages(detected, readings_per_point))
    with session_factory(engine)() as s:
        for i, rm in enumerate(registry.machines[detected:], start=detected):
            _copy_readings(s, f"fan-{i % detected:03d}", rm.id)
        s.commit()
    engine.dispose()


def _through_service(url: str, messages: tuple[tuple[str, bytes], ...]) -> None:
    """Hand ``messages`` to the service's batch path (no broker, nothing published), its
    clock at ``T_END`` so no reading is refused as too old."""
    settings = load_settings(None, env={}, overrides={
        "broker.url": "mqtt://127.0.0.1:1", "database.url": url, "retention.enabled": False})
    svc = Service(settings, clock=T_END.timestamp, stale_check_s=0)
    try:
        for b in range(0, len(messages), BATCH):
            outs = svc.handle_batch(messages[b:b + BATCH])
            refused = [(o.kind, o.reason) for o in outs if o.kind != OutcomeKind.WAVEFORM]
            if refused:
                raise RuntimeError(f"the service did not store every seeded reading: {refused[:3]}")
    finally:
        svc.store.close()


def _copy(s: Session, table: Table, source: str, target: str, *where, set_: dict | None = None) -> None:
    """Copy the rows of machine ``source`` in ``table`` (all columns but the id) to
    machine ``target``, in one ``INSERT ... SELECT``; ``set_`` gives columns a value."""
    cols = [c for c in table.c if c.name != "id"]
    given = {"machine_id": target, **(set_ or {})}
    picked = [literal(given[c.name]).label(c.name) if c.name in given else c for c in cols]
    s.execute(insert(table).from_select([c.name for c in cols],
                                        select(*picked).where(table.c.machine_id == source, *where)))


def _copy_readings(s: Session, source: str, target: str) -> None:
    """The measurements of ``source``, its points' newest spectra and its stored status,
    as ``target``'s (the status without alarms: copies carry none)."""
    snaps = SpectrumSnapshot.__table__.c
    newest = select(func.max(snaps.ts)).where(snaps.machine_id == source).scalar_subquery()
    _copy(s, Measurement.__table__, source, target)
    _copy(s, SpectrumSnapshot.__table__, source, target, snaps.ts == newest)
    # In place of the blank status the registry import gave it.
    s.execute(delete(MachineStatus).where(MachineStatus.machine_id == target))
    _copy(s, MachineStatus.__table__, source, target, set_={"state_rank": NORMAL_RANK, "active_alarms": 0})


def seed_large(url: str, machines: int, readings_per_point: int = 4, *, detected: int = 3) -> None:
    """A plant of ``machines`` machines for the overview's scale (its statement count and
    benchmark): the first ``detected`` seeded as :func:`seed` does (readings, alarms and
    statuses through the service), the others added in bulk as copies of them, registry
    rows (machine, points, modes) and stored status (the odd ones' without its alarms, so
    the plant has both; the overview reads the status, not the alarm rows), with their own
    ids and names and no readings."""
    seed(url, machines=detected, readings_per_point=readings_per_point, detected=detected)
    engine = make_engine(url)
    try:
        with session_factory(engine)() as s:
            sources = {t: [dict(r._mapping) for r in s.execute(select(t))]
                       for t in (Machine.__table__, MeasurementPoint.__table__, Mode.__table__,
                                 MachineStatus.__table__)}
            for t, rows in sources.items():
                by_machine: dict[str, list[dict]] = {}
                for r in rows:
                    by_machine.setdefault(r["machine_id" if "machine_id" in r else "id"], []).append(r)
                new = []
                for i in range(detected, machines):
                    target = f"fan-{i:05d}"
                    for r in by_machine.get(f"fan-{i % detected:03d}", ()):
                        r = {k: v for k, v in r.items() if not (t is Mode.__table__ and k == "id")}
                        if t is Machine.__table__:
                            r.update(id=target, name=f"Dryer fan {i}", location=f"Hall {i % 4 + 1}", position=i)
                        else:
                            r["machine_id"] = target
                        if t is MachineStatus.__table__ and i % 2:
                            r.update(state_rank=NORMAL_RANK, active_alarms=0)
                        new.append(r)
                for b in range(0, len(new), 2000):
                    s.execute(insert(t), new[b:b + 2000])
            s.commit()
    finally:
        engine.dispose()
