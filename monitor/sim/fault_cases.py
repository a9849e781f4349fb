"""Fault cases: one small pump set per machine fault, each with a radial and an axial
accelerometer, for checking what the likely-cause hints say about a known cause.

Each case is the same invented pump set (1480 r/min, group 2 on a rigid foundation) with
one cause made strong enough to put the radial point in ISO 20816 zone C, as a fault worth
a hint would; ``healthy`` keeps every force at a commissioned level. The forces follow the
simulator's model (monitor/sim/simulate.py): unbalance at 1x, a 2x force for
misalignment, a series of harmonic and half-order forces for looseness, periodic bearing
impacts at BPFO, a magnetic force at twice the supply frequency, a vane-pass force, and a
structural mode placed next to 1x for resonance.

Direction: an unbalance force rotates in the radial plane, so the axial point sees only a
small part of it (:data:`AXIAL_UNBALANCE_SHARE`); an angular misalignment bends the
coupling once per half turn and shows axially at 2x as strongly as radially
(:data:`AXIAL_MISALIGNMENT_SHARE`; common practice). The axial point is simulated with
the model's forces scaled so.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import replace

import numpy as np

from monitor.model.bearing_geometry import BearingGeometry
from monitor.model.readings import Waveform
from monitor.model.registry import Machine, Mode, Point, Registry
from monitor.sim.simulate import (
    BearingDefect,
    MachineModel,
    ModalMode,
    point_inertance,
    simulate_reading,
)

#: The fault cases, by name.
FAULT_CASES = ("healthy", "unbalance", "misalignment", "looseness", "outer_race", "resonance",
               "electrical", "flow")

SPEED_HZ = 24.67
FS_HZ = 5120.0
N_SAMPLES = 16384
RADIAL, AXIAL = "de-h", "de-a"
AXIAL_UNBALANCE_SHARE = 0.15
AXIAL_MISALIGNMENT_SHARE = 1.2
#: 6205-like geometry: 9 balls of 7.94 mm on a 39.04 mm pitch circle.
GEOMETRY = BearingGeometry(9, 7.94, 39.04)
START_TS = 1_780_000_000.0


def _force_for(model: MachineModel, hz: float, v_rms_mm_s: float) -> float:
    """Force amplitude (N) at ``hz`` that gives ``v_rms_mm_s`` mm/s RMS at the radial point."""
    omega = 2.0 * math.pi * hz
    a_per_n = abs(complex(point_inertance(model, RADIAL, hz)))
    return v_rms_mm_s * math.sqrt(2.0) / 1e3 * omega / a_per_n


def _unbalance_for(model: MachineModel, v_rms_mm_s: float) -> float:
    omega = 2.0 * math.pi * SPEED_HZ
    return _force_for(model, SPEED_HZ, v_rms_mm_s) / omega**2


def case_machine(case: str) -> Machine:
    """The registry entry of a fault case (machine ``fc-<case>``)."""
    if case not in FAULT_CASES:
        raise ValueError(f"case must be one of {FAULT_CASES}, got {case!r}.")
    # the frame mode well clear of every excitation, but next to 1x in the resonance case
    mode_hz, zeta = (25.9, 0.03) if case == "resonance" else (75.0, 0.10)
    settings = ({"bearing_elements": 9, "bearing_ball_diameter_mm": 7.94,
                 "bearing_pitch_diameter_mm": 39.04, "bearing_contact_angle_deg": 0}
                if case == "outer_race" else {})
    return Machine(
        id=f"fc-{case.replace('_', '-')}", name=f"Fault case: {case.replace('_', ' ')}",
        location="simulated", machine_class="group2/rigid", speed_range_rpm=(1440.0, 1500.0),
        excitation_orders=(1.0, 2.0, 6.0),
        line_frequency_hz=50.0 if case == "electrical" else None,
        points=(Point(RADIAL, "horizontal", "acceleration", "m/s^2", FS_HZ),
                Point(AXIAL, "axial", "acceleration", "m/s^2", FS_HZ)),
        modes=(Mode("frame", mode_hz, damping_ratio=zeta, source="design calculation"),),
        settings=settings,
    )


def case_model(case: str) -> MachineModel:
    """The simulation model of a fault case at its radial point."""
    machine = case_machine(case)
    mode = machine.modes[0]
    base = MachineModel(
        machine.id, modes=(ModalMode(mode.frequency_hz, mode.damping_ratio or 0.03, modal_mass_kg=200.0,
                                     default_participation=0.4,
                                     name="frame"),),
        rigid_mass_kg=600.0, mount_frequency_hz=80.0, mount_damping_ratio=0.25,
        force_noise_n=10.0, sensor_noise_m_s2=0.01, pass_reference_hz=SPEED_HZ,
    )
    m = replace(base, unbalance_kg_m=_unbalance_for(base, 0.8),
                misalignment_n=_force_for(base, 2 * SPEED_HZ, 0.2),
                pass_orders=(6.0,), pass_force_n=_force_for(base, 6 * SPEED_HZ, 0.1))
    if case == "unbalance":
        m = replace(m, unbalance_kg_m=_unbalance_for(base, 4.0))
    elif case == "misalignment":
        m = replace(m, unbalance_kg_m=_unbalance_for(base, 1.8),
                    misalignment_n=_force_for(base, 2 * SPEED_HZ, 2.6))
    elif case == "looseness":
        m = replace(m, unbalance_kg_m=_unbalance_for(base, 2.6), harmonic_forces_n={
            o: _force_for(base, o * SPEED_HZ, v) for o, v in
            ((0.5, 0.5), (1.5, 0.5), (3.0, 0.8), (4.0, 0.7), (5.0, 0.6), (7.0, 0.5), (8.0, 0.45))})
    elif case == "outer_race":
        m = replace(m, bearing=BearingDefect(order=GEOMETRY.bpfo_order, impact_peak_m_s2=12.0,
                                             resonance_hz=1900.0, resonance_damping=0.04,
                                             slip_pct=1.5, reference_hz=SPEED_HZ))
    elif case == "resonance":
        # a commissioned rotor whose 1x the frame mode amplifies
        m = replace(m, unbalance_kg_m=_unbalance_for(base, 3.5))
    elif case == "electrical":
        m = replace(m, line_frequency_hz=50.0, magnetic_force_n=_force_for(base, 100.0, 2.8),
                    unbalance_kg_m=_unbalance_for(base, 1.6))
    elif case == "flow":
        m = replace(m, unbalance_kg_m=_unbalance_for(base, 1.2),
                    pass_force_n=_force_for(base, 6 * SPEED_HZ, 3.0))
    return m


def axial_model(model: MachineModel) -> MachineModel:
    """The model seen at the axial point: little of the unbalance, the misalignment in full."""
    return replace(model, unbalance_kg_m=model.unbalance_kg_m * AXIAL_UNBALANCE_SHARE,
                   misalignment_n=model.misalignment_n * AXIAL_MISALIGNMENT_SHARE)


def case_readings(case: str, count: int = 2, seed: int = 0) -> Iterator[Waveform]:
    """``count`` readings of each point of a fault case, an hour apart, in time order."""
    model = case_model(case)
    seeds = np.random.SeedSequence(seed).spawn(2 * count)
    for k in range(count):
        ts = START_TS + 3600.0 * k
        for j, (point, m) in enumerate(((RADIAL, model), (AXIAL, axial_model(model)))):
            yield simulate_reading(m, point, speed_hz=SPEED_HZ, ts=ts, fs_hz=FS_HZ, n_samples=N_SAMPLES,
                                   seed=seeds[2 * k + j], include_speed=True,
                                   reading_id=f"{m.machine_id}-{point}-{k}")


def case_registry(cases: tuple[str, ...] = FAULT_CASES) -> Registry:
    """The registry of the fault cases ``cases``."""
    return Registry(machines=tuple(case_machine(c) for c in cases))
