"""A simulated run-up and coast-down through one structural mode, as the MQTT messages a
machine with a once-per-revolution sensor sends, and a store holding that machine: the
input of the live-passage tests (tests/test_service_passages.py,
tests/test_dashboard_passages.py).

The machine is the simulator's (monitor/sim/simulate.py): one mode driven by a rotating
unbalance, integrated in the time domain. Its modal parameters (:data:`FN_HZ`,
:data:`ZETA`) are physics inputs, not expected values: the checks compare the service's
estimates with them by the textbook method named beside each check.
"""

from __future__ import annotations

import time

from service_helpers import message, offline_service

from monitor.model.readings import SpeedReading, Waveform
from monitor.model.registry import Machine, Mode, Point, Registry
from monitor.sim.simulate import MachineModel, ModalMode, simulate_run
from monitor.sim.speed_profile import SpeedProfile
from monitor.store import Store, import_registry, upgrade

FN_HZ, ZETA = 20.0, 0.02
#: Sweep rate, Hz/s: below the largest linear sweep rate for a steady-state response,
#: 54 fr^2 zeta^2 Hz/min = 0.144 Hz/s at 20 Hz and zeta 0.02 (D. J. Ewins, *Modal
#: Testing: Theory, Practice and Application*, sweep rate; from memory). Faster, the
#: response peak lags the sweep (1.6 % at 0.5 Hz/s, docs/modes.md).
RATE_HZ_S = 0.1
#: A run-up from 17 to 23 Hz and a coast-down back, with a steady stretch around each.
PROFILE = (SpeedProfile.steady(17.0, 15.0)
           .then(SpeedProfile.ramp(17.0, 23.0, 6.0 / RATE_HZ_S))
           .then(SpeedProfile.steady(23.0, 15.0))
           .then(SpeedProfile.ramp(23.0, 17.0, 6.0 / RATE_HZ_S))
           .then(SpeedProfile.steady(17.0, 15.0)))
#: A reading every 0.5 s: 0.05 Hz apart at 0.1 Hz/s, 16 across the 0.8 Hz half-power band.
INTERVAL_S = 0.5
FS_HZ = 2560.0
MACHINE = "fan-9"


def machine(modes: tuple[Mode, ...] = ()) -> Machine:
    """The registry entry: one accelerometer, operating range 15-25 Hz (its sweeps stop
    below 7.5 Hz), the stored ``modes``."""
    return Machine(MACHINE, name="Test fan", machine_class="group2/flexible",
                   speed_range_rpm=(900.0, 1500.0), excitation_orders=(1.0,),
                   points=(Point("de-h", fs_hz=FS_HZ),), modes=modes)


def run_messages(end_ts: float | None = None) -> list[tuple[str, bytes]]:
    """The run's messages, ending at ``end_ts`` (default: a minute ago): before each block
    a speed message of its instant (the mean speed over the block), then the block with
    its once-per-revolution pulses."""
    model = MachineModel(MACHINE, modes=(ModalMode(FN_HZ, ZETA, modal_mass_kg=50.0),),
                         rigid_mass_kg=None, unbalance_kg_m=1e-3, sensor_noise_m_s2=0.01)
    end = time.time() - 60.0 if end_ts is None else end_ts
    readings = simulate_run(model, PROFILE, points=["de-h"], fs_hz=FS_HZ, block_samples=2560,
                            interval_s=INTERVAL_S, start_ts=end - PROFILE.duration_s, seed=13,
                            once_per_rev=True)
    assert any(isinstance(r, SpeedReading) for r in readings)
    assert all(r.once_per_rev_s is not None for r in readings if isinstance(r, Waveform))
    return [message(r) for r in readings]


def store_with(url: str, spec: Machine) -> str:
    """The schema at ``url`` with ``spec`` as its registry; returns ``url``."""
    upgrade(url)
    store = Store.open(url)
    try:
        with store.transaction() as s:
            import_registry(s, Registry(machines=(spec,)))
    finally:
        store.close()
    return url


def feed(url: str, messages: list[tuple[str, bytes]], batch: int = 25) -> None:
    """``messages`` through a new service's batch path (no broker), ``batch`` at a time;
    every one must be stored."""
    svc = offline_service(url)
    try:
        for i in range(0, len(messages), batch):
            outs = svc.handle_batch(messages[i:i + batch])
            assert all(o.kind in ("waveform", "speed") for o in outs), [o.reason for o in outs]
    finally:
        svc.store.close()
