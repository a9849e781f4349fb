"""Seed a store for dashboard tests and the benchmark, the way the service fills it.

The plant is invented ("Harbour Mill"); its numbers are demo data, never expected values.

The first ``detected`` machines get their readings the way the service makes them:
waveforms from monitor.sim.simulate, analysed by monitor.analysis.waveform.analyse_waveform, evaluated
by monitor.detection.evaluator.MachineEvaluator (baselines, zones, margins, trends), written by
monitor.store.write_reading with the evaluation object, so the dashboard is tested on the
shapes the service really writes. Alarms stay invented (fixed counts for the tests); the
detector's own transitions are not written. The other machines (bulk rows for the
statement-count test and the benchmark) are synthetic rows in the same shapes: an
evaluation copied from a real one with this row's values; the newest reading of each
point carries every feature and its margin rows (from monitor.detection.margins), older ones only
the overall feature and no margin rows, to keep a million rows small (the service's rows
are about 4 kB of evaluation JSON each).
"""

from __future__ import annotations

import copy
import dataclasses
import datetime as dt
import functools

import numpy as np
from sqlalchemy import insert, select

from monitor.analysis.waveform import analyse_waveform
from monitor.detection.evaluator import MachineEvaluator
from monitor.detection.margins import margin_table
from monitor.model.jsonsafe import jsonable
from monitor.model.registry import Machine as RegMachine
from monitor.model.registry import Mode as RegMode
from monitor.model.registry import Point as RegPoint
from monitor.model.registry import Registry
from monitor.sim.simulate import MachineModel, ModalMode, simulate_reading
from monitor.store.auth import create_user
from monitor.store.db import make_engine, session_factory
from monitor.store.migrate import upgrade_engine
from monitor.store.models import (
    Alarm,
    AlarmTransitionRow,
    Measurement,
    SpectrumSnapshot,
    pack_amplitudes,
)
from monitor.store.registry_sync import import_registry
from monitor.store.writes import write_reading

T_END = dt.datetime(2026, 3, 10, 12, 0, tzinfo=dt.UTC)
PASSWORDS = {"ada": "admin-pass-1", "eng": "engineer-pass-1", "vic": "viewer-pass-1"}
ROLES = {"ada": "admin", "eng": "engineer", "vic": "viewer"}
POINTS = ("de-h", "nde-v")
ORDERS = (1.0, 2.0, 7.0)
FS_HZ = 2048.0
BLOCK = 4096


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


@functools.lru_cache(maxsize=8)
def _detected(detected: int, readings_per_point: int) -> tuple:
    """(analysis, evaluation) of every simulated reading of the first ``detected`` fans,
    in time order; computed once per process (the detector is deterministic)."""
    registry = plant(detected)
    evaluators = {m.id: MachineEvaluator(m) for m in registry.machines}
    k = np.arange(readings_per_point)
    out = []
    for i, rm in enumerate(registry.machines):
        model = MachineModel(
            machine_id=rm.id,
            modes=tuple(ModalMode(frequency_hz=mo.frequency_hz, damping_ratio=0.04 if mo.damping_ratio else 0.06,
                                  modal_mass_kg=150.0, name=mo.name) for mo in rm.modes),
            unbalance_kg_m=2e-3, misalignment_n=40.0, pass_orders=(7.0,), pass_force_n=25.0,
            sensor_noise_m_s2=0.02)
        speed = _speed(i, k)
        for x in range(readings_per_point):
            ts = (T_END - dt.timedelta(minutes=10) * int(readings_per_point - 1 - x)).timestamp()
            for j, point in enumerate(rm.points):
                # Unbalance grows slowly on the drive end, so growth trends have a slope.
                grown = dataclasses.replace(model, unbalance_kg_m=model.unbalance_kg_m * (1 + 0.01 * x * (j == 0)))
                w = simulate_reading(grown, point.id, speed_hz=float(speed[x]), ts=ts, fs_hz=FS_HZ, n_samples=BLOCK,
                                     seed=1000 * i + 10 * x + j, include_speed=True, reading_id=f"{rm.id}-{point.id}-{x}")
                analysis = analyse_waveform(w, rm, point)
                out.append((analysis, evaluators[rm.id].evaluate(analysis, w), x == readings_per_point - 1))
    return tuple(out)


def seed(url: str, machines: int = 3, readings_per_point: int = 50, *, names: dict[int, str] | None = None,
         alarms_per_machine: int = 2, detected: int = 3) -> None:
    """Create the schema and an invented plant of ``machines`` machines, two points each,
    ``readings_per_point`` readings every 10 minutes up to ``T_END``."""
    engine = make_engine(url)
    upgrade_engine(engine)
    s = session_factory(engine)()
    for n, role in ROLES.items():
        create_user(s, n, PASSWORDS[n], role)
    registry = plant(machines, names)
    import_registry(s, registry)
    s.flush()
    step = dt.timedelta(minutes=10)
    times = [T_END - step * (readings_per_point - 1 - x) for x in range(readings_per_point)]
    template: dict | None = None
    for analysis, ev, last in _detected(min(detected, machines), readings_per_point):
        write_reading(s, analysis, zone=ev.zone, health=ev.health, evaluation=ev, keep_spectrum=last)
        if template is None and ev.features and ev.margins:
            template = jsonable(ev)
    s.flush()
    if machines > detected:
        template = template or _fallback_template()
        _bulk(s, registry.machines[detected:], detected, times, template)
    _alarms(s, [m.id for m in registry.machines], alarms_per_machine)
    s.commit()
    s.close()
    engine.dispose()


def _fallback_template() -> dict:
    """A real evaluation when no machine was detected: one reading through the detector."""
    reg = plant(1)
    rm = reg.machines[0]
    w = simulate_reading(MachineModel(machine_id=rm.id, unbalance_kg_m=2e-3, sensor_noise_m_s2=0.02), "de-h",
                         speed_hz=14.0, ts=T_END.timestamp(), fs_hz=FS_HZ, n_samples=BLOCK, include_speed=True)
    return jsonable(MachineEvaluator(rm).evaluate(analyse_waveform(w, rm, rm.points[0]), w))


def _bulk(s, machines, first: int, times: list[dt.datetime], template: dict) -> None:
    """Synthetic rows in the service's shapes (see the module docstring)."""
    rng = np.random.default_rng(7)
    n = len(times)
    k = np.arange(n)
    n_bins = 2049
    f = np.arange(n_bins) * 0.5
    meas, snaps = [], []
    for off, rm in enumerate(machines):
        i = first + off
        speed = _speed(i, k)
        for pid in POINTS:
            ov = np.abs(1.5 + 0.002 * k + 0.1 * rng.standard_normal(n))
            for x in range(n):
                v, sp = float(ov[x]), float(speed[x])
                zone = "A" if v <= 2.3 else "B" if v <= 4.5 else "C" if v <= 7.1 else "D"
                orders = [{"order": o, "frequency_hz": o * sp, "amplitude": 0.3 * v / o,
                           "velocity_mm_s": a * v, "phase_deg": None} for o, a in zip(ORDERS, (0.9, 0.3, 0.1), strict=True)]
                ev = copy.copy(template)
                ev.update(machine=rm.id, point=pid, ts=times[x].timestamp(), reading_id=None, speed_hz=sp,
                          overall_velocity_mm_s_rms=v, zone=zone, transitions=[], margins=[])
                if x == n - 1:
                    ev["margins"] = [r.to_json() for r in margin_table(rm, sp)]
                    ev["features"] = [dict(fe, value=v if fe["name"] == "overall" else fe["value"])
                                      for fe in template["features"]]
                else:
                    ev["features"] = [dict(fe, value=v) for fe in template["features"] if fe["name"] == "overall"]
                meas.append({"machine_id": rm.id, "point_id": pid, "ts": times[x], "speed_hz": sp,
                             "speed_source": "measured", "overall_velocity_mm_s_rms": v, "zone": zone,
                             "orders": orders, "peaks": [], "evaluation": ev})
            amp = 0.002 + 0.001 * rng.random(n_bins)
            for order, a in ((1, 0.4), (2, 0.15), (7, 0.08)):
                amp += a * np.exp(-0.5 * ((f - order * speed[-1]) / 0.6) ** 2)
            snaps.append({"machine_id": rm.id, "point_id": pid, "ts": times[-1], "kind": "velocity", "unit": "mm/s",
                          "scaling": "rms", "f0_hz": 0.0, "df_hz": 0.5, "n_bins": n_bins,
                          "amplitudes": pack_amplitudes(amp), "evidence": False})
        if len(meas) > 50_000:
            s.execute(insert(Measurement), meas)
            meas = []
    if meas:
        s.execute(insert(Measurement), meas)
    s.execute(insert(SpectrumSnapshot), snaps)
    s.flush()


def _alarms(s, machine_ids: list[str], per_machine: int) -> None:
    snap_ids = {(m, p): i for i, m, p in s.execute(
        select(SpectrumSnapshot.id, SpectrumSnapshot.machine_id, SpectrumSnapshot.point_id))}
    for mid in machine_ids:
        for a in range(per_machine):
            raised = T_END - dt.timedelta(hours=3 * (a + 1))
            state = "active" if a == 0 else "cleared"
            al = Alarm(machine_id=mid, point_id="de-h", kind=("resonance_proximity", "amplitude_growth")[a % 2],
                       subject="pedestal rocking@1x" if a % 2 == 0 else "overall", severity=("alert", "advisory")[a % 2],
                       state=state, raised_at=raised, cleared_at=None if state == "active" else raised + dt.timedelta(hours=1),
                       evidence={"margin_pct": 4.2, "required_pct": 12.1}, last_transition="raised" if state == "active" else "cleared",
                       last_transition_at=raised)
            s.add(al)
            s.flush()
            s.add(AlarmTransitionRow(alarm_id=al.id, transition="raised", severity=al.severity, state="active", at=raised,
                                     evidence=al.evidence, spectrum_snapshot_id=snap_ids.get((mid, "de-h"))))


def expected_nearest_margin(mode_hz: float, speed_hz: float, orders=(1, 2, 7)) -> float:
    """Separation margin, % of the mode frequency (DESIGN.md section 4), of the excitation nearest the mode."""
    return min(abs(o * speed_hz - mode_hz) / mode_hz * 100.0 for o in orders)

