"""Seed a store for dashboard tests and the benchmark, through the store's models only.

The plant is invented ("Harbour Mill"); its numbers are demo data, never expected values.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
from sqlalchemy import insert
from werkzeug.security import generate_password_hash

from monitor.store.db import make_engine, session_factory
from monitor.store.migrate import upgrade_engine
from monitor.store.models import (
    Alarm,
    AlarmTransitionRow,
    Machine,
    Measurement,
    MeasurementPoint,
    Mode,
    SpectrumSnapshot,
    User,
    pack_amplitudes,
)

T_END = dt.datetime(2026, 3, 10, 12, 0, tzinfo=dt.UTC)
PASSWORDS = {"ada": "admin-pass-1", "eng": "engineer-pass-1", "vic": "viewer-pass-1"}
ROLES = {"ada": "admin", "eng": "engineer", "vic": "viewer"}


def seed(url: str, machines: int = 3, readings_per_point: int = 50, *, names: dict[int, str] | None = None,
         alarms_per_machine: int = 2) -> None:
    """Create the schema and an invented plant of ``machines`` machines, two points each."""
    engine = make_engine(url)
    upgrade_engine(engine)
    s = session_factory(engine)()
    for n, role in ROLES.items():
        s.add(User(name=n, password_hash=generate_password_hash(PASSWORDS[n]), role=role))
    for i in range(machines):
        mid = f"fan-{i:03d}"
        s.add(Machine(id=mid, name=(names or {}).get(i, f"Dryer fan {i}"), location=f"Hall {i % 4 + 1}",
                      machine_class="group2/flexible", speed_min_rpm=300, speed_max_rpm=1500,
                      excitation_orders=[1, 2, 7], line_frequency_hz=None, limits_mm_s=None,
                      settings={}, position=i))
    s.flush()
    rng = np.random.default_rng(7)
    meas, snaps = [], []
    step = dt.timedelta(minutes=10)
    n_bins = 2049
    f = np.arange(n_bins) * 0.5
    for i in range(machines):
        mid = f"fan-{i:03d}"
        for j, pid in enumerate(("de-h", "nde-v")):
            s.add(MeasurementPoint(machine_id=mid, id=pid, direction=("horizontal", "vertical")[j],
                                   quantity="acceleration", unit="m/s^2", fs_hz=2048.0, position=j))
        s.add(Mode(machine_id=mid, name="pedestal rocking", frequency_hz=18.0 + i % 5, damping_ratio=0.04,
                   source="impact test", date=dt.date(2026, 1, 15), position=0))
        s.add(Mode(machine_id=mid, name="base plate", frequency_hz=95.0, amplification_factor=8.0,
                   source="design calculation", position=1))
        s.flush()
        for pid in ("de-h", "nde-v"):
            k = np.arange(readings_per_point)
            ts = [T_END - step * int(readings_per_point - 1 - x) for x in k]
            speed = 14.0 + 2.0 * np.sin(k / 40.0) + 0.05 * i
            ov = 1.5 + 0.002 * k + 0.1 * rng.standard_normal(readings_per_point)
            for x in range(readings_per_point):
                v = float(abs(ov[x]))
                meas.append({"machine_id": mid, "point_id": pid, "ts": ts[x], "speed_hz": float(speed[x]),
                             "speed_source": "measured", "overall_velocity_mm_s_rms": v,
                             "zone": "A" if v <= 2.3 else "B" if v <= 4.5 else "C" if v <= 7.1 else "D",
                             "orders": [{"order": 1.0, "frequency_hz": float(speed[x]), "amplitude": 0.3, "velocity_mm_s": 0.9 * v},
                                        {"order": 2.0, "frequency_hz": float(2 * speed[x]), "amplitude": 0.1, "velocity_mm_s": 0.3 * v}],
                             "peaks": [], "evaluation": {"baseline_mm_s_rms": 1.5}})
            amp = 0.002 + 0.001 * rng.random(n_bins)
            for order, a in ((1, 0.4), (2, 0.15), (7, 0.08)):
                amp += a * np.exp(-0.5 * ((f - order * speed[-1]) / 0.6) ** 2)
            snaps.append({"machine_id": mid, "point_id": pid, "ts": ts[-1], "kind": "velocity", "unit": "mm/s",
                          "scaling": "rms", "f0_hz": 0.0, "df_hz": 0.5, "n_bins": n_bins,
                          "amplitudes": pack_amplitudes(amp), "evidence": False})
        if len(meas) > 50_000:
            s.execute(insert(Measurement), meas)
            meas = []
    if meas:
        s.execute(insert(Measurement), meas)
    s.execute(insert(SpectrumSnapshot), snaps)
    s.flush()
    snap_ids = {(r.machine_id, r.point_id): r.id for r in s.query(SpectrumSnapshot)}
    for i in range(machines):
        mid = f"fan-{i:03d}"
        for a in range(alarms_per_machine):
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
                                     evidence=al.evidence, spectrum_snapshot_id=snap_ids[(mid, "de-h")]))
    s.commit()
    s.close()
    engine.dispose()


def expected_nearest_margin(mode_hz: float, speed_hz: float, orders=(1, 2, 7)) -> float:
    """Separation margin, % of the mode frequency (DESIGN.md section 4), of the excitation nearest the mode."""
    return min(abs(o * speed_hz - mode_hz) / mode_hz * 100.0 for o in orders)

