"""``whirlwatch simulate``: write synthetic stream files from the physics-based simulator.

Scenarios
---------
``plant``
    The demo plant of ``sample_streams/`` (an invented water treatment works, six weeks
    from 2026-03-02): writes ``plant.toml`` and one ``<machine>.jsonl`` per machine.
    :func:`plant_messages` yields the same traffic merged in time order, for publishing
    to a broker; :func:`plant_registry` gives the registry.
``steady``, ``ramp``, ``steps``, ``run-up``, ``coast-down``
    One synthetic test rig (machine ``rig-1``, one accelerometer, one structural mode)
    driven along that speed profile: writes ``rig.toml`` and ``rig-1.jsonl``.

The same seed gives byte-identical files.
"""

from __future__ import annotations

import datetime as _dt
import heapq
import math
import sys
from collections.abc import Callable, Iterator
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import click
import numpy as np

from monitor.commands.usage import usage_errors
from monitor.io.streams import DEFAULT_PREFIX, reading_message, write_stream
from monitor.model import validate
from monitor.model.bearing_geometry import BearingGeometry
from monitor.model.readings import SpeedReading, Waveform
from monitor.model.registry import Machine, Mode, Point, Registry
from monitor.model.registry_file import dump_registry
from monitor.sim.faults import SensorFault, grown_unbalance
from monitor.sim.simulate import (
    BearingDefect,
    MachineModel,
    ModalMode,
    point_inertance,
    simulate_reading,
    simulate_run,
)
from monitor.sim.speed_profile import SpeedProfile

#: Start of the plant scenario (a Monday), epoch seconds UTC.
PLANT_START = _dt.datetime(2026, 3, 2, tzinfo=_dt.UTC).timestamp()
PLANT_DAYS = 42
DEFAULT_SEED = 20260302
DAY = 86400.0
HOUR = 3600.0
LOCATION = "Kestrel Lane water treatment works"

Message = tuple[str, dict[str, Any]]


def _unbalance_for(model: MachineModel, point: str, speed_hz: float, v_rms_mm_s: float) -> float:
    """Unbalance m*e (kg m) that gives ``v_rms_mm_s`` mm/s RMS at 1x at ``point``."""
    omega = 2 * math.pi * speed_hz
    a_per_n = abs(complex(point_inertance(model, point, speed_hz)))
    v_peak = v_rms_mm_s * math.sqrt(2) / 1e3
    return v_peak * omega / (a_per_n * omega**2)


# ----------------------------------------------------------------------------- machines


@dataclass(frozen=True)
class _Plan:
    """One machine of the scenario: its registry entry, its simulation model and a
    generator of its readings in time order."""

    machine: Machine
    model: MachineModel
    readings: Callable[[np.random.SeedSequence], Iterator[Waveform | SpeedReading]]
    count: int  # waveform readings, for the progress bar


def _fan() -> _Plan:
    """ef-2: drive-controlled extract fan on flexible mounts; a pedestal mode at 15.5 Hz
    sits inside the operating range (6-25 Hz)."""
    fs, n = 2560.0, 4096
    mode = Mode("pedestal lateral", 15.5, damping_ratio=0.025, source="impact test",
                date=_dt.date(2026, 2, 17))
    machine = Machine(
        id="ef-2", name="Filter gallery extract fan 2", location=f"{LOCATION}, filter gallery roof",
        machine_class="group2/flexible", speed_range_rpm=(360.0, 1500.0),
        excitation_orders=(1.0, 2.0, 8.0),
        points=(Point("de-h", "horizontal", "acceleration", "m/s^2", fs),),
        modes=(mode,),
    )
    base = MachineModel(
        "ef-2",
        modes=(ModalMode(15.5, 0.025, modal_mass_kg=120.0, default_participation=0.3,
                         name=mode.name),),
        rigid_mass_kg=600.0, mount_frequency_hz=3.5, mount_damping_ratio=0.15,
        misalignment_n=25.0, pass_orders=(8.0,), pass_force_n=40.0,
        harmonic_forces_n={3.0: 8.0}, force_noise_n=20.0, sensor_noise_m_s2=0.02,
    )
    # G6.3-like balance: about 1.6 mm/s RMS at 1x at the top speed (ISO zone B)
    model = replace(base, unbalance_kg_m=_unbalance_for(base, "de-h", 25.0, 1.6))
    day_hz, night_hz, near_mode_hz = 22.0, 10.0, 15.0

    # (ts, speed) of single steady readings; two continuous runs
    steady: list[tuple[float, float]] = []
    for day in range(PLANT_DAYS):
        near = 12 <= day < 16  # energy-saving set-point close to the mode
        hours = range(0, 24, 2) if near else (0, 8, 16)
        for h in hours:
            if day == 0 and h < 8:
                continue  # commissioning run-up at 06:00 on day 0
            ts = PLANT_START + day * DAY + h * HOUR + 120.0
            if 6 <= h < 22:
                steady.append((ts, near_mode_hz if near else day_hz))
            else:
                steady.append((ts, night_hz))
    commissioning = SpeedProfile.run_up(25.0, 480.0).then(SpeedProfile.steady(25.0, 60.0)).then(
        SpeedProfile.steps([25.0, near_mode_hz, day_hz], dwell_s=300.0, ramp_hz_per_s=0.5)
    )
    stop = SpeedProfile.steady(day_hz, 10.0).then(SpeedProfile.coast_down(day_hz, 120.0))
    runs = [
        (PLANT_START + 6 * HOUR, commissioning, 20.0),
        (PLANT_START + 28 * DAY + 22 * HOUR, stop, 4.0),
    ]
    n_runs = sum(int((p.duration_s - n / fs) // iv) + 1 for _, p, iv in runs)

    def readings(ss: np.random.SeedSequence) -> Iterator[Waveform | SpeedReading]:
        seeds = iter(ss.spawn(len(steady) + len(runs)))
        items: list[tuple[float, Any]] = [(ts, ("steady", hz)) for ts, hz in steady]
        items += [(ts, ("run", (p, iv))) for ts, p, iv in runs]
        for ts, (kind, arg) in sorted(items, key=lambda x: x[0]):
            seed = next(seeds)
            if kind == "run":
                profile, interval = arg
                yield from simulate_run(
                    model, profile, points=["de-h"], fs_hz=fs, block_samples=n,
                    interval_s=interval, start_ts=ts, seed=seed,
                )
                continue
            rng = np.random.default_rng(seed)
            hz = arg + rng.normal(0.0, 0.01)  # drive speed ripple
            yield SpeedReading("ef-2", ts, hz)
            yield simulate_reading(model, "de-h", speed_hz=hz, ts=ts, fs_hz=fs, n_samples=n,
                                   seed=seed, reading_id=f"ef-2-{int(ts)}")

    return _Plan(machine, model, readings, len(steady) + n_runs)


def _pump_with_growing_unbalance() -> _Plan:
    """rwp-1: fixed-speed raw water pump; impeller build-up grows the unbalance
    exponentially over the six weeks, from zone B into zone C, close to D."""
    fs, n = 2560.0, 4096
    machine = Machine(
        id="rwp-1", name="Raw water pump 1", location=f"{LOCATION}, inlet pumping station",
        machine_class="group2/rigid", speed_range_rpm=(1400.0, 1500.0),
        excitation_orders=(1.0, 2.0, 5.0),
        points=(Point("de-h", "horizontal", "acceleration", "m/s^2", fs),),
        modes=(Mode("plinth rocking", 38.0, damping_ratio=0.04, source="design calculation",
                    date=_dt.date(2025, 11, 3)),),
    )
    base = MachineModel(
        "rwp-1",
        modes=(ModalMode(38.0, 0.04, modal_mass_kg=300.0, default_participation=0.5,
                         name="plinth rocking"),),
        rigid_mass_kg=900.0, mount_frequency_hz=60.0, mount_damping_ratio=0.25,
        misalignment_n=60.0, pass_orders=(5.0,), pass_force_n=150.0, pass_reference_hz=24.75,
        harmonic_forces_n={3.0: 20.0}, force_noise_n=40.0, sensor_noise_m_s2=0.02,
    )
    # 1x from 1.1 mm/s RMS on day 0 to about 4.2 mm/s RMS on day 42 (B/C 2.8, C/D 4.5)
    u0 = _unbalance_for(base, "de-h", 24.75, 1.1)
    doubling = PLANT_DAYS * math.log(2) / math.log(4.2 / 1.1)
    times = [PLANT_START + d * DAY + h * HOUR + 300.0 for d in range(PLANT_DAYS) for h in (0, 6, 12, 18)]

    def readings(ss: np.random.SeedSequence) -> Iterator[Waveform | SpeedReading]:
        for ts, seed in zip(times, ss.spawn(len(times)), strict=True):
            rng = np.random.default_rng(seed)
            days = (ts - PLANT_START) / DAY
            u = grown_unbalance(u0, days, doubling_days=doubling) * (1 + rng.normal(0, 0.03))
            hz = 24.75 + rng.normal(0.0, 0.03)  # induction motor slip follows the load
            yield simulate_reading(replace(base, unbalance_kg_m=u), "de-h", speed_hz=hz, ts=ts,
                                   fs_hz=fs, n_samples=n, seed=seed, reading_id=f"rwp-1-{int(ts)}")

    return _Plan(machine, base, readings, len(times))


def _clean_blower() -> _Plan:
    """ab-1: aeration blower in good condition, the reference machine. Its casing support
    mode (78 Hz, well damped on resilient mounts) sits between 1x and 2x outside both
    approach bands, so a correct set-up raises nothing here."""
    fs, n = 2560.0, 4096
    machine = Machine(
        id="ab-1", name="Aeration blower 1", location=f"{LOCATION}, blower house",
        machine_class="group2/rigid", speed_range_rpm=(2900.0, 3000.0),
        excitation_orders=(1.0, 2.0, 13.0),
        points=(Point("nde-v", "vertical", "acceleration", "m/s^2", fs),),
        modes=(Mode("casing support", 78.0, damping_ratio=0.10, source="impact test",
                    date=_dt.date(2026, 1, 20)),),
    )
    base = MachineModel(
        "ab-1",
        modes=(ModalMode(78.0, 0.10, modal_mass_kg=150.0, default_participation=0.4,
                         name="casing support"),),
        rigid_mass_kg=700.0, mount_frequency_hz=110.0, mount_damping_ratio=0.25,
        misalignment_n=40.0, pass_orders=(13.0,), pass_force_n=30.0, pass_reference_hz=49.33,
        harmonic_forces_n={3.0: 15.0}, force_noise_n=30.0, sensor_noise_m_s2=0.02,
    )
    model = replace(base, unbalance_kg_m=_unbalance_for(base, "nde-v", 49.33, 0.9))
    times = [PLANT_START + d * DAY + h * HOUR + 600.0 for d in range(PLANT_DAYS) for h in (3, 15)]

    def readings(ss: np.random.SeedSequence) -> Iterator[Waveform | SpeedReading]:
        for ts, seed in zip(times, ss.spawn(len(times)), strict=True):
            rng = np.random.default_rng(seed)
            hz = 49.33 + rng.normal(0.0, 0.03)
            m = replace(model, unbalance_kg_m=model.unbalance_kg_m * (1 + rng.normal(0, 0.03)))
            yield simulate_reading(m, "nde-v", speed_hz=hz, ts=ts, fs_hz=fs, n_samples=n,
                                   seed=seed, reading_id=f"ab-1-{int(ts)}")

    return _Plan(machine, model, readings, len(times))


def _motor_with_sensor_fault() -> _Plan:
    """bwm-1: backwash pump motor (50 Hz supply, tach fitted); its accelerometer cable
    connector corrodes: spikes from day 19, the signal stuck flat from day 31."""
    fs, n = 2560.0, 4096
    machine = Machine(
        id="bwm-1", name="Backwash pump motor", location=f"{LOCATION}, backwash pump room",
        machine_class="group2/rigid", speed_range_rpm=(2940.0, 2990.0),
        excitation_orders=(1.0, 2.0), line_frequency_hz=50.0,
        points=(Point("de-h", "horizontal", "acceleration", "m/s^2", fs),),
        modes=(Mode("motor frame", 175.0, damping_ratio=0.04, source="impact test",
                    date=_dt.date(2026, 1, 20)),),
    )
    base = MachineModel(
        "bwm-1",
        modes=(ModalMode(175.0, 0.04, modal_mass_kg=80.0, default_participation=0.3,
                         name="motor frame"),),
        rigid_mass_kg=450.0, mount_frequency_hz=150.0, mount_damping_ratio=0.25,
        misalignment_n=30.0, line_frequency_hz=50.0, magnetic_force_n=60.0,
        harmonic_forces_n={3.0: 10.0}, force_noise_n=20.0, sensor_noise_m_s2=0.02,
    )
    model = replace(base, unbalance_kg_m=_unbalance_for(base, "de-h", 49.5, 1.0))
    times = [PLANT_START + d * DAY + h * HOUR + 900.0 for d in range(PLANT_DAYS) for h in (4, 16)]

    def readings(ss: np.random.SeedSequence) -> Iterator[Waveform | SpeedReading]:
        for ts, seed in zip(times, ss.spawn(len(times)), strict=True):
            rng = np.random.default_rng(seed)
            day = (ts - PLANT_START) / DAY
            fault = None
            if day >= 31:
                fault = SensorFault("flat_line", level=0.0, start_fraction=0.0)
            elif day >= 19 and rng.random() < 0.3 + 0.05 * (day - 19):
                fault = SensorFault("spikes", level=60.0, count=int(2 + (day - 19)))
            hz = 49.5 + rng.normal(0.0, 0.02)
            m = replace(model, unbalance_kg_m=model.unbalance_kg_m * (1 + rng.normal(0, 0.03)))
            yield SpeedReading("bwm-1", ts, hz)
            yield simulate_reading(m, "de-h", speed_hz=hz, ts=ts, fs_hz=fs, n_samples=n,
                                   seed=seed, fault=fault, reading_id=f"bwm-1-{int(ts)}")

    return _Plan(machine, model, readings, len(times))


def _pump_with_bearing_defect() -> _Plan:
    """sp-2: sludge transfer pump; an outer-race defect on the drive-end bearing (6205
    geometry) appears on day 14 and grows; it rings a housing resonance near 1.9 kHz."""
    fs, n = 5120.0, 8192
    geometry = BearingGeometry(9, 7.94, 39.04)
    machine = Machine(
        id="sp-2", name="Sludge transfer pump 2", location=f"{LOCATION}, sludge building",
        machine_class="group2/rigid", speed_range_rpm=(1440.0, 1500.0),
        excitation_orders=(1.0, 2.0, 4.0),
        points=(Point("de-h", "horizontal", "acceleration", "m/s^2", fs),),
        modes=(Mode("bedplate bending", 41.0, damping_ratio=0.04, source="impact test",
                    date=_dt.date(2026, 1, 21)),),
        settings={
            "bearing_elements": 9,
            "bearing_ball_diameter_mm": 7.94,
            "bearing_pitch_diameter_mm": 39.04,
            "bearing_contact_angle_deg": 0,
        },
    )
    base = MachineModel(
        "sp-2",
        modes=(ModalMode(41.0, 0.04, modal_mass_kg=250.0, default_participation=0.4,
                         name="bedplate bending"),),
        rigid_mass_kg=650.0, mount_frequency_hz=70.0, mount_damping_ratio=0.25,
        misalignment_n=50.0, pass_orders=(4.0,), pass_force_n=80.0, pass_reference_hz=24.6,
        harmonic_forces_n={3.0: 15.0}, force_noise_n=30.0, sensor_noise_m_s2=0.03,
    )
    model = replace(base, unbalance_kg_m=_unbalance_for(base, "de-h", 24.6, 1.2))
    times = [PLANT_START + d * DAY + h * HOUR + 1200.0 for d in range(PLANT_DAYS) for h in (5, 17)]

    def readings(ss: np.random.SeedSequence) -> Iterator[Waveform | SpeedReading]:
        for ts, seed in zip(times, ss.spawn(len(times)), strict=True):
            rng = np.random.default_rng(seed)
            day = (ts - PLANT_START) / DAY
            m = model
            if day >= 14:
                m = replace(model, bearing=BearingDefect(
                    order=geometry.bpfo_order, impact_peak_m_s2=2.0 + 1.2 * (day - 14),
                    resonance_hz=1900.0, resonance_damping=0.04, slip_pct=1.5,
                    reference_hz=24.6,
                ))
            hz = 24.6 + rng.normal(0.0, 0.03)
            yield simulate_reading(m, "de-h", speed_hz=hz, ts=ts, fs_hz=fs, n_samples=n,
                                   seed=seed, reading_id=f"sp-2-{int(ts)}")

    return _Plan(machine, model, readings, len(times))


def _plans() -> list[_Plan]:
    return [
        _fan(),
        _pump_with_growing_unbalance(),
        _clean_blower(),
        _motor_with_sensor_fault(),
        _pump_with_bearing_defect(),
    ]


def plant_registry() -> Registry:
    """The demo plant's machine registry (the content of ``sample_streams/plant.toml``)."""
    return Registry(machines=tuple(p.machine for p in _plans()))


def plant_models() -> dict[str, MachineModel]:
    """The simulation model of every demo-plant machine, by machine id (healthy state)."""
    return {p.machine.id: p.model for p in _plans()}


def _machine_messages(
    plan: _Plan, seed: np.random.SeedSequence, prefix: str
) -> Iterator[tuple[float, int, Message]]:
    for k, r in enumerate(plan.readings(seed)):
        yield (r.ts, k, reading_message(r, prefix))


def plant_messages(
    seed: int = DEFAULT_SEED, *, prefix: str = DEFAULT_PREFIX, machines: set[str] | None = None
) -> Iterator[Message]:
    """The whole plant's traffic, ``(topic, payload dict)``, merged in time order.

    Lazy: readings are simulated as they are consumed. A speed reading comes just before
    the waveform it belongs to (same ts). ``machines`` limits the output to those ids.
    """
    plans = _plans()
    seeds = np.random.SeedSequence(seed).spawn(len(plans))
    streams = [
        _machine_messages(p, s, prefix)
        for p, s in zip(plans, seeds, strict=True)
        if machines is None or p.machine.id in machines
    ]
    for _ts, _k, msg in heapq.merge(*streams, key=lambda x: (x[0], x[1])):
        yield msg


# ----------------------------------------------------------------------------- rig


def _rig(profile_name: str, speed_hz: float, duration_s: float) -> _Plan:
    """rig-1: one accelerometer on a test rig with a 15 Hz mode, along one profile."""
    fs, n = 2560.0, 4096
    machine = Machine(
        id="rig-1", name="Test rig 1", location="simulated", machine_class="group2/flexible",
        speed_range_rpm=(60.0, 3000.0), excitation_orders=(1.0, 2.0, 6.0),
        points=(Point("de-h", "horizontal", "acceleration", "m/s^2", fs),),
        modes=(Mode("frame lateral", 15.0, damping_ratio=0.03, source="design calculation"),),
    )
    model = MachineModel(
        "rig-1", modes=(ModalMode(15.0, 0.03, 100.0, default_participation=0.2),),
        rigid_mass_kg=400.0, mount_frequency_hz=3.0, unbalance_kg_m=0.004, misalignment_n=20.0,
        pass_orders=(6.0,), pass_force_n=20.0, force_noise_n=10.0, sensor_noise_m_s2=0.02,
    )
    profiles = {
        "steady": lambda: SpeedProfile.steady(speed_hz, duration_s),
        "ramp": lambda: SpeedProfile.ramp(0.5 * speed_hz, speed_hz, duration_s),
        "steps": lambda: SpeedProfile.steps(
            [0.4 * speed_hz, 0.7 * speed_hz, speed_hz], duration_s / 3, 0.5
        ),
        "run-up": lambda: SpeedProfile.run_up(speed_hz, duration_s),
        "coast-down": lambda: SpeedProfile.coast_down(speed_hz, duration_s),
    }
    profile = profiles[profile_name]()
    interval = max(n / fs, profile.duration_s / 100)

    def readings(ss: np.random.SeedSequence) -> Iterator[Waveform | SpeedReading]:
        yield from simulate_run(model, profile, points=["de-h"], fs_hz=fs, block_samples=n,
                                interval_s=interval, start_ts=PLANT_START, seed=ss)

    count = int((profile.duration_s - n / fs) // interval) + 1
    return _Plan(machine, model, readings, count)


# ----------------------------------------------------------------------------- command


_PROFILES = ("steady", "ramp", "steps", "run-up", "coast-down")


@click.command("simulate")
@click.option("--out", "out_dir", default=None, type=click.Path(file_okay=False, path_type=Path),
              help="Directory for the stream files (.jsonl) and the registry (.toml).")
@click.option("--broker", default=None, metavar="URL",
              help="Publish the traffic to this broker (mqtt:// or mqtts://) instead of, or "
                   "as well as, writing files.")
@click.option("--speedup", type=float, default=1.0, show_default=True,
              help="With --broker: play this many times faster than real time (0 = as fast "
                   "as possible); timestamps are moved so the last message is stamped now.")
@click.option("--max-gap", "max_gap_s", type=float, default=None,
              help="With --broker: longest wall-clock wait between two messages, s.")
@click.option("--scenario", type=click.Choice(("plant", *_PROFILES)), default="plant",
              show_default=True,
              help="'plant': the demo plant of sample_streams/; otherwise one test rig "
                   "driven along that speed profile.")
@click.option("--seed", type=int, default=DEFAULT_SEED, show_default=True,
              help="Seed of every random draw; the same seed gives identical files.")
@click.option("--machine", "machine_ids", multiple=True,
              help="Plant scenario: write only this machine (repeatable).")
@click.option("--speed-hz", type=float, default=25.0, show_default=True,
              help="Test rig: top or steady running speed, Hz.")
@click.option("--duration", "duration_s", type=float, default=300.0, show_default=True,
              help="Test rig: length of the speed profile, s.")
@click.option("--prefix", default=DEFAULT_PREFIX, show_default=True, help="MQTT topic prefix.")
def simulate(
    out_dir: Path, scenario: str, seed: int, machine_ids: tuple[str, ...], speed_hz: float,
    duration_s: float, prefix: str, broker: str | None = None, speedup: float = 1.0,
    max_gap_s: float | None = None,
) -> None:
    """Write synthetic vibration and speed streams (.jsonl) plus their machine registry,
    or publish them to a broker (--broker)."""
    if out_dir is None and broker is None:
        raise click.UsageError("give --out DIR to write files or --broker URL to publish (or both).")
    if speedup != 0 and speedup < 1:
        raise click.UsageError(f"--speedup must be 0 (as fast as possible) or >= 1, got {speedup}.")
    if scenario == "plant":
        plans = _plans()
        known = [p.machine.id for p in plans]
        unknown = sorted(set(machine_ids) - set(known))
        if unknown:
            raise click.UsageError(
                f"--machine {unknown[0]!r} is not in the plant; choose from {', '.join(known)}."
            )
        registry_name = "plant.toml"
    else:
        with usage_errors():
            validate.in_range(speed_hz, "--speed-hz", 0.0, 500.0, high_open=False, unit=" Hz")
            validate.in_range(duration_s, "--duration", 5.0, 3600.0, low_open=False,
                              high_open=False, unit=" s")
        plans = [_rig(scenario, speed_hz, duration_s)]
        registry_name = "rig.toml"
    if broker is not None:
        _publish(plans, seed, machine_ids, prefix, broker, speedup, max_gap_s)
    if out_dir is None:
        return
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise click.ClickException(f"cannot create output directory {str(out_dir)!r}: {exc.strerror}.") from exc
    header = (
        f"# Machine registry of the {'demo plant' if scenario == 'plant' else 'test rig'}, "
        f"written by `whirlwatch simulate --scenario {scenario}`.\n"
    )
    registry = Registry(machines=tuple(p.machine for p in plans))
    (out_dir / registry_name).write_text(header + dump_registry(registry), encoding="utf-8")
    seeds = np.random.SeedSequence(seed).spawn(len(plans))
    selected = [(p, s) for p, s in zip(plans, seeds, strict=True)
                if not machine_ids or p.machine.id in machine_ids]
    total = sum(p.count for p, _ in selected)
    with click.progressbar(length=total, label="simulating", file=sys.stderr) as bar:
        for plan, s in selected:
            path = out_dir / f"{plan.machine.id}.jsonl"

            def counted(plan: _Plan = plan, s: np.random.SeedSequence = s) -> Iterator[Message]:
                for _ts, _k, (topic, payload) in _machine_messages(plan, s, prefix):
                    if topic.endswith("/waveform"):
                        bar.update(1)
                    yield topic, payload

            try:
                n = write_stream(path, counted())
            except OSError as exc:
                raise click.ClickException(f"cannot write {str(path)!r}: {exc.strerror}.") from exc
            click.echo(f"{path}: {n} messages", err=True)
    click.echo(f"{out_dir / registry_name}: {len(registry.machines)} machines", err=True)


def _publish(plans: list[_Plan], seed: int, machine_ids: tuple[str, ...], prefix: str,
             broker: str, speedup: float, max_gap_s: float | None) -> None:
    """Simulate the selected machines, merge in time order and publish at QoS 1."""
    from monitor.io.mqtt_names import MqttConfigError
    from monitor.io.replay import StreamPublisher, replay
    from monitor.redact import redact

    seeds = np.random.SeedSequence(seed).spawn(len(plans))
    streams = [_machine_messages(p, s, prefix) for p, s in zip(plans, seeds, strict=True)
               if not machine_ids or p.machine.id in machine_ids]
    messages = [m for _ts, _k, m in heapq.merge(*streams, key=lambda x: (x[0], x[1]))]
    try:
        pub = StreamPublisher(broker)
    except (MqttConfigError, OSError) as exc:
        raise click.ClickException(f"cannot publish to {redact(broker)!r}: {exc}") from None
    try:
        with click.progressbar(length=len(messages), label="publishing", file=sys.stderr) as bar:
            n = replay(messages, pub, speedup=speedup, max_gap_s=max_gap_s,
                       progress=lambda _i, _n: bar.update(1))
    finally:
        pub.close()
    click.echo(f"{redact(broker)}: {n} messages published", err=True)
