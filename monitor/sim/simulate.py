"""Physics-based machine simulator: vibration waveforms and speed readings with known causes.

The measured acceleration at a point is the modal superposition of the machine's modes,
each a single-degree-of-freedom (SDOF) oscillator, plus a rigid-body term (the whole
machine on its mounts), driven by the forces a rotating machine makes:

- unbalance, a rotating force ``U * Omega^2`` at 1x (``U = m*e`` in kg m), so 1x grows
  with the square of speed;
- a 2x force (misalignment), constant amplitude in N;
- vane or blade pass at the configured pass orders, growing with speed squared (fan laws);
- further harmonic forces (looseness, ...) at chosen orders;
- a magnetic force at twice line frequency (motors);
- broadband force noise and additive sensor noise;
- optionally a rolling-element bearing defect: impacts at a defect frequency (e.g. BPFO)
  that ring a high-frequency resonance.

The forces are built as time series from the speed history (shaft angle = integral of
speed), then every mode is integrated in the time domain by an exact first-order-hold
discretisation of its state equations run as a recursive filter
(``scipy.signal.lfilter``). Run-ups and coast-downs therefore sweep through modes with
the right transient behaviour (amplitude peak, lag growing through 90 degrees).

Everything here is pure and deterministic for a given seed: numbers in, arrays and
:mod:`monitor.model.readings` objects out; no clock, no files.

Main entry points
-----------------
``simulate_signal``     a continuous record at one point for a given speed history.
``simulate_reading``    one steady-speed :class:`~monitor.model.readings.Waveform` (warm-up
                        discarded), e.g. for trend scenarios spread over weeks.
``simulate_run``        a continuous run along a
                        :class:`~monitor.sim.speed_profile.SpeedProfile`, cut into
                        waveform blocks plus :class:`~monitor.model.readings.SpeedReading` s.
``point_inertance``     closed-form steady-state acceleration per newton at a point.

Beside it: :mod:`monitor.sim.sdof` (one mode, the physics check), :mod:`monitor.sim.speed_profile`
(speed against time), :mod:`monitor.sim.faults` (sensor faults, unbalance growth). Bearing
defect frequencies come from :class:`monitor.model.bearing_geometry.BearingGeometry`.

References
----------
W. T. Thomson, *Theory of Vibration with Applications*: forced harmonic vibration of a
damped SDOF system, rotating unbalance.
R. B. Randall and J. Antoni, "Rolling element bearing diagnostics: a tutorial",
Mechanical Systems and Signal Processing 25 (2011) 485-520: defect frequencies, random
slip of 1-2 % between impacts.
"""

from __future__ import annotations

import math
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, field, replace

import numpy as np
from scipy.integrate import cumulative_trapezoid

from monitor.model import units, validate
from monitor.model.readings import SpeedReading, Waveform
from monitor.sim.faults import SensorFault, apply_sensor_fault
from monitor.sim.sdof import sdof_response
from monitor.sim.speed_profile import SpeedProfile

# ----------------------------------------------------------------------------- model


@dataclass(frozen=True)
class ModalMode:
    """One structural mode as the simulator sees it.

    Attributes
    ----------
    frequency_hz : float
        Undamped natural frequency, Hz.
    damping_ratio : float
        Fraction of critical damping, 0 < zeta < 1.
    modal_mass_kg : float
        Modal mass, kg: a force F (N) at the mode's natural frequency far below it gives a
        static modal displacement F / (modal_mass_kg * (2 pi f_n)^2) m.
    participation : mapping of point id -> float
        Participation factor of the mode at each measurement point (product of the mode
        shape at the force and at the point), dimensionless; points not listed use
        ``default_participation``.
    default_participation : float
    name : str
    """

    frequency_hz: float
    damping_ratio: float
    modal_mass_kg: float = 100.0
    participation: Mapping[str, float] = field(default_factory=dict)
    default_participation: float = 1.0
    name: str = ""

    def factor(self, point: str) -> float:
        return float(self.participation.get(point, self.default_participation))


@dataclass(frozen=True)
class BearingDefect:
    """A localised bearing defect: periodic impacts ringing a high-frequency resonance.

    Attributes
    ----------
    order : float
        Impact rate as a multiple of shaft speed, e.g.
        :attr:`monitor.model.bearing_geometry.BearingGeometry.bpfo_order`.
    impact_peak_m_s2 : float
        Peak acceleration of one impact's ringing at ``reference_hz`` shaft speed, m/s^2;
        scales with speed squared (impact velocity squared, common practice).
    resonance_hz, resonance_damping : float
        The structural/sensor resonance the impacts excite, Hz and damping ratio.
    slip_pct : float
        Standard deviation of the spacing between impacts, percent of the mean period
        (rolling elements slip: 1-2 %, Randall and Antoni 2011).
    reference_hz : float
        Shaft speed at which ``impact_peak_m_s2`` holds, Hz.
    participation : mapping of point id -> float
        How strongly each point sees the impacts (default 1).
    """

    order: float
    impact_peak_m_s2: float
    resonance_hz: float = 1800.0
    resonance_damping: float = 0.05
    slip_pct: float = 1.0
    reference_hz: float = 25.0
    participation: Mapping[str, float] = field(default_factory=dict)


@dataclass(frozen=True)
class MachineModel:
    """Everything the simulator needs about one machine; forces in N, masses in kg.

    Attributes
    ----------
    machine_id : str
    modes : tuple of ModalMode
        Structural modes.
    rigid_mass_kg : float or None
        Mass of the whole machine on its mounts, kg: the rigid-body ("background") term
        that gives a sensible response away from the modes (mass line F/M above the mount
        frequency, stiffness line below). None leaves it out.
    mount_frequency_hz, mount_damping_ratio : float
        Natural frequency (Hz) and damping of the machine bouncing on its mounts.
    unbalance_kg_m : float
        Unbalance m*e, kg m; force U * (2 pi f)^2 N at 1x.
    unbalance_phase_deg : float
        Angle of the heavy spot from the shaft reference, degrees.
    misalignment_n : float
        2x force amplitude, N (independent of speed).
    pass_orders : tuple of float
        Vane/blade pass orders (vanes x 1), with force ``pass_force_n`` N at
        ``pass_reference_hz`` shaft speed, growing with speed squared.
    harmonic_forces_n : mapping of order -> N
        Further constant-amplitude forces at orders of running speed (looseness, ...).
    line_frequency_hz, magnetic_force_n : float
        For motors: a force of ``magnetic_force_n`` N at twice line frequency.
    force_noise_n : float
        Broadband (white) force, N RMS, driven through the modes.
    sensor_noise_m_s2 : float
        Additive white measurement noise, m/s^2 RMS (converted for other units).
    bearing : BearingDefect or None
    """

    machine_id: str
    modes: tuple[ModalMode, ...] = ()
    rigid_mass_kg: float | None = 500.0
    mount_frequency_hz: float = 4.0
    mount_damping_ratio: float = 0.2
    unbalance_kg_m: float = 0.0
    unbalance_phase_deg: float = 0.0
    misalignment_n: float = 0.0
    pass_orders: tuple[float, ...] = ()
    pass_force_n: float = 0.0
    pass_reference_hz: float = 25.0
    harmonic_forces_n: Mapping[float, float] = field(default_factory=dict)
    line_frequency_hz: float | None = None
    magnetic_force_n: float = 0.0
    force_noise_n: float = 0.0
    sensor_noise_m_s2: float = 0.0
    bearing: BearingDefect | None = None

    def all_modes(self) -> tuple[ModalMode, ...]:
        """Structural modes plus the rigid-body mount mode (when ``rigid_mass_kg`` is set)."""
        if self.rigid_mass_kg is None:
            return self.modes
        mount = ModalMode(
            frequency_hz=self.mount_frequency_hz,
            damping_ratio=self.mount_damping_ratio,
            modal_mass_kg=self.rigid_mass_kg,
            name="rigid body on mounts",
        )
        return (mount, *self.modes)

    def slowest_decay_s(self) -> float:
        """Longest modal time constant 1/(zeta*omega_n), s."""
        taus = [1.0 / (m.damping_ratio * 2 * math.pi * m.frequency_hz) for m in self.all_modes()]
        return max(taus, default=0.0)


def _validate_model(model: MachineModel) -> None:
    for i, m in enumerate(model.all_modes()):
        validate.positive(m.frequency_hz, f"modes[{i}].frequency_hz")
        validate.in_range(m.damping_ratio, f"modes[{i}].damping_ratio", 0.0, 1.0)
        validate.positive(m.modal_mass_kg, f"modes[{i}].modal_mass_kg")
    validate.non_negative(model.unbalance_kg_m, "unbalance_kg_m")
    validate.non_negative(model.force_noise_n, "force_noise_n")
    validate.non_negative(model.sensor_noise_m_s2, "sensor_noise_m_s2")
    if model.bearing is not None:
        validate.positive(model.bearing.order, "bearing.order")
        validate.positive(model.bearing.resonance_hz, "bearing.resonance_hz")
        validate.in_range(model.bearing.resonance_damping, "bearing.resonance_damping", 0.0, 1.0)


# ----------------------------------------------------------------------------- response


def point_inertance(model: MachineModel, point: str, freq_hz: np.ndarray | float) -> np.ndarray:
    """Steady-state acceleration at ``point`` per unit force, (m/s^2)/N, complex.

    The closed-form counterpart of the time-domain path (rigid-body term included),
    ``sum_i phi_i / m_i * (-w^2) / (w_i^2 - w^2 + 2j zeta_i w_i w)``, for sizing a
    scenario's forces to a target vibration level.
    """
    w = 2.0 * math.pi * np.asarray(freq_hz, dtype=float)
    out = np.zeros(w.shape, dtype=complex)
    for m in model.all_modes():
        wn = 2.0 * math.pi * m.frequency_hz
        out += m.factor(point) / m.modal_mass_kg * (-(w**2)) / (
            wn * wn - w * w + 2j * m.damping_ratio * wn * w
        )
    return out


# ----------------------------------------------------------------------------- forces


def _shaft_angle(speed_hz: np.ndarray, fs_hz: float) -> np.ndarray:
    """Shaft angle, rad: 2 pi times the running integral of speed (phase = integral of
    speed, so a changing speed keeps a continuous phase)."""
    return 2.0 * math.pi * cumulative_trapezoid(speed_hz, dx=1.0 / fs_hz, initial=0)


def _force(
    model: MachineModel, speed_hz: np.ndarray, fs_hz: float, t0_s: float, rng: np.random.Generator
) -> np.ndarray:
    """Total force on the machine, N, one value per sample."""
    theta = _shaft_angle(speed_hz, fs_hz)
    omega = 2.0 * math.pi * speed_hz
    f = model.unbalance_kg_m * omega**2 * np.cos(theta + math.radians(model.unbalance_phase_deg))
    if model.misalignment_n:
        f += model.misalignment_n * np.cos(2.0 * theta + 0.7)
    if model.pass_force_n:
        scale = (speed_hz / model.pass_reference_hz) ** 2
        for k, order in enumerate(model.pass_orders):
            f += model.pass_force_n * scale * np.cos(order * theta + 1.3 * k)
    for k, (order, amp) in enumerate(sorted(model.harmonic_forces_n.items())):
        f += float(amp) * np.cos(float(order) * theta + 0.4 + 0.9 * k)
    if model.line_frequency_hz and model.magnetic_force_n:
        t = t0_s + np.arange(speed_hz.size) / fs_hz
        f += model.magnetic_force_n * np.cos(2.0 * math.pi * 2.0 * model.line_frequency_hz * t)
    if model.force_noise_n:
        f += rng.normal(0.0, model.force_noise_n, speed_hz.size)
    return f


def _bearing_impacts(
    defect: BearingDefect, speed_hz: np.ndarray, fs_hz: float, rng: np.random.Generator
) -> np.ndarray:
    """Ringing of the bearing resonance after each impact, m/s^2 (before participation)."""
    cycles = defect.order * _shaft_angle(speed_hz, fs_hz) / (2.0 * math.pi)
    idx = np.flatnonzero(np.diff(np.floor(cycles)) > 0) + 1
    out = np.zeros(speed_hz.size)
    if idx.size == 0:
        return out
    # exact (fractional-sample) impact instants: rounding them to whole samples would
    # add a periodic timing jitter that smears the high harmonics of the impact train
    c0, c1 = cycles[idx - 1], cycles[idx]
    pos = idx - 1 + (np.floor(c1) - c0) / (c1 - c0)
    if defect.slip_pct > 0:
        period = fs_hz / np.maximum(defect.order * speed_hz[idx], 1e-9)
        pos = pos + rng.normal(0.0, defect.slip_pct / 100.0, idx.size) * period
    keep = (pos >= 0) & (pos < out.size - 1)
    pos, idx = pos[keep], idx[keep]
    w = 2.0 * math.pi * defect.resonance_hz
    # an impulse of area I rings the resonance with displacement peak ~ I/omega, so the
    # output omega^2 x (force over mass, no direct feed-through spike) peaks at ~ I omega
    area = defect.impact_peak_m_s2 * (speed_hz[idx] / defect.reference_hz) ** 2 / w
    lo = np.floor(pos).astype(int)
    frac = pos - lo
    np.add.at(out, lo, (1.0 - frac) * area * fs_hz)
    np.add.at(out, lo + 1, frac * area * fs_hz)
    return w * w * sdof_response(
        out, fs_hz, defect.resonance_hz, defect.resonance_damping, "displacement"
    )


def _to_unit(si: np.ndarray, unit: str) -> np.ndarray:
    return si * units.from_si_factor(unit)


def simulate_signal(
    model: MachineModel,
    point: str,
    speed_hz: np.ndarray,
    fs_hz: float,
    *,
    seed: int | np.random.SeedSequence | None = 0,
    unit: str = "m/s^2",
    t0_s: float = 0.0,
    warmup_s: float | None = 0.0,
) -> np.ndarray:
    """A continuous vibration record at ``point`` for the speed history ``speed_hz``.

    Parameters
    ----------
    model : MachineModel
    point : str
        Measurement point id (selects the participation factors).
    speed_hz : array
        Running speed per sample, Hz (rev/s); may vary (run-ups, coast-downs, steps).
    fs_hz : float
        Sample rate, Hz.
    seed : int or SeedSequence
        Seed of the noise, slip and spike generator; same seed, same record.
    unit : str
        Output unit: ``m/s^2`` or ``g`` (acceleration), ``mm/s`` or ``in/s`` (velocity),
        ``um`` or ``mil`` (displacement).
    t0_s : float
        Absolute time of the first sample, s (phase of the line-frequency force).
    warmup_s : float or None
        Seconds simulated at the first speed before the record and discarded so the
        record starts in steady state; None chooses 8 time constants of the slowest
        mode (at most 30 s); 0 starts the machine at rest.

    Returns
    -------
    numpy.ndarray, float64, same length as ``speed_hz``, in ``unit``.
    """
    _validate_model(model)
    fs_hz = validate.sample_rate_hz(fs_hz)
    speed = np.asarray(speed_hz, dtype=float)
    if speed.ndim != 1 or speed.size == 0:
        raise ValueError(f"speed_hz must be a non-empty 1-D array, got shape {speed.shape}.")
    if not np.all(np.isfinite(speed)) or np.any(speed < 0):
        raise ValueError("speed_hz must be finite and >= 0 everywhere.")
    quantity = units.quantity_of(unit)
    for m in model.all_modes():
        if m.frequency_hz >= fs_hz / 2:
            raise ValueError(
                f"mode at {m.frequency_hz} Hz is above the Nyquist frequency of fs_hz={fs_hz}."
            )
    n_warm = _warmup_samples(model, warmup_s, fs_hz)
    if n_warm:
        speed = np.concatenate([np.full(n_warm, speed[0]), speed])
    rng = np.random.default_rng(seed)
    force = _force(model, speed, fs_hz, t0_s - n_warm / fs_hz, rng)
    out = np.zeros(speed.size)
    for m in model.all_modes():
        phi = m.factor(point)
        if phi:
            out += phi * sdof_response(
                force / m.modal_mass_kg, fs_hz, m.frequency_hz, m.damping_ratio, quantity
            )
    if model.bearing is not None:
        ring = _bearing_impacts(model.bearing, speed, fs_hz, rng)
        phi_b = float(model.bearing.participation.get(point, 1.0))
        if quantity != "acceleration":
            # the ringing is far above running speed: integrate in the frequency domain
            ring = _integrate(ring, fs_hz, quantity)
        out += phi_b * ring
    if model.sensor_noise_m_s2:
        noise = rng.normal(0.0, model.sensor_noise_m_s2, speed.size)
        out += noise if quantity == "acceleration" else _integrate(noise, fs_hz, quantity)
    return _to_unit(out[n_warm:], unit)


def _warmup_samples(model: MachineModel, warmup_s: float | None, fs_hz: float) -> int:
    """Samples simulated before a record and discarded (``warmup_s`` of
    :func:`simulate_signal`; None: 8 time constants of the slowest mode, at most 30 s)."""
    if warmup_s is None:
        warmup_s = min(8.0 * model.slowest_decay_s(), 30.0)
    return int(round(validate.non_negative(warmup_s, "warmup_s") * fs_hz))


def once_per_rev_times(speed_hz: np.ndarray, fs_hz: float, warmup_samples: int = 0) -> np.ndarray:
    """The pulses of a once-per-revolution sensor on the simulated shaft: the instants
    (s from the first sample after ``warmup_samples`` samples at the first speed, as
    :func:`simulate_signal` runs them) at which the shaft angle the forces are built from
    passes a whole turn (angle 0 is the reference mark; the unbalance sits at
    ``unbalance_phase_deg`` from it). Each instant is interpolated linearly between the
    two samples around it."""
    speed = np.asarray(speed_hz, dtype=float)
    if warmup_samples:
        speed = np.concatenate([np.full(warmup_samples, speed[0]), speed])
    turns = _shaft_angle(speed, fs_hz) / (2.0 * math.pi)
    idx = np.flatnonzero(np.diff(np.floor(turns)) > 0) + 1
    c0, c1 = turns[idx - 1], turns[idx]
    pos = idx - 1 + (np.floor(c1) - c0) / (c1 - c0)
    t = (pos - warmup_samples) / fs_hz
    return t[t >= 0.0]


def _integrate(a: np.ndarray, fs_hz: float, quantity: str, f_low_hz: float = 2.0) -> np.ndarray:
    spec = np.fft.rfft(a)
    f = np.fft.rfftfreq(a.size, 1.0 / fs_hz)
    jw = 2j * np.pi * np.where(f < f_low_hz, np.inf, f)
    spec = spec / jw if quantity == "velocity" else spec / jw**2
    return np.fft.irfft(spec, a.size)


# ----------------------------------------------------------------------------- readings


def simulate_reading(
    model: MachineModel,
    point: str,
    *,
    speed_hz: float,
    ts: float,
    fs_hz: float,
    n_samples: int,
    unit: str = "m/s^2",
    seed: int | np.random.SeedSequence | None = 0,
    fault: SensorFault | None = None,
    include_speed: bool = False,
    reading_id: str | None = None,
) -> Waveform:
    """One block at steady speed ``speed_hz`` (Hz), starting in steady state.

    ``ts`` is the epoch time (s, UTC) of the first sample; ``include_speed`` puts the
    speed into the waveform (as a sensor with a tach input would).
    """
    validate.whole_number(n_samples, "n_samples")
    ss = np.random.SeedSequence(seed) if not isinstance(seed, np.random.SeedSequence) else seed
    sig_seed, fault_seed = ss.spawn(2)
    x = simulate_signal(
        model, point, np.full(int(n_samples), float(speed_hz)), fs_hz,
        seed=sig_seed, unit=unit, t0_s=ts, warmup_s=None,
    )
    if fault is not None:
        x = apply_sensor_fault(x, fault, fault_seed)
    return Waveform(
        machine=model.machine_id,
        point=point,
        ts=float(ts),
        fs_hz=float(fs_hz),
        unit=unit,
        samples=x,
        speed_hz=float(speed_hz) if include_speed else None,
        reading_id=reading_id,
    )


def simulate_run(
    model: MachineModel,
    profile: SpeedProfile,
    *,
    points: Sequence[str],
    fs_hz: float,
    block_samples: int,
    interval_s: float,
    start_ts: float,
    unit: str = "m/s^2",
    seed: int | np.random.SeedSequence | None = 0,
    speed_readings: bool = True,
    warmup_s: float | None = None,
    once_per_rev: bool = False,
) -> list[Waveform | SpeedReading]:
    """A continuous run along ``profile``, cut into blocks every ``interval_s`` s.

    One continuous record is simulated per point (all driven by the same forces), so
    transients through modes carry from block to block. Each block is a
    :class:`Waveform` of ``block_samples`` samples starting at ``start_ts + k*interval_s``;
    with ``speed_readings`` each block is preceded by a :class:`SpeedReading` at the same
    ts with the mean speed over the block (Hz). With ``once_per_rev`` each block carries
    the once-per-revolution pulses that fall in it (:func:`once_per_rev_times`, s from
    its first sample); off by default. Returned in time order.
    """
    validate.positive(interval_s, "interval_s")
    validate.whole_number(block_samples, "block_samples")
    n_total = int(math.floor(profile.duration_s * fs_hz)) + 1
    speed = profile.speed_at(np.arange(n_total) / fs_hz)
    step = int(round(interval_s * fs_hz))
    starts = np.arange(0, n_total - int(block_samples) + 1, step)
    ss = np.random.SeedSequence(seed) if not isinstance(seed, np.random.SeedSequence) else seed
    records = {
        p: simulate_signal(
            model, p, speed, fs_hz, seed=s, unit=unit, t0_s=start_ts, warmup_s=warmup_s
        )
        for p, s in zip(points, ss.spawn(len(points)), strict=True)
    }
    pulses = None
    if once_per_rev:
        pulses = once_per_rev_times(speed, fs_hz, _warmup_samples(model, warmup_s, fs_hz))
    out: list[Waveform | SpeedReading] = []
    for k, i0 in enumerate(starts):
        ts = round(start_ts + i0 / fs_hz, 3)
        block = slice(int(i0), int(i0) + int(block_samples))
        tacho = None
        if pulses is not None:
            t0, t1 = i0 / fs_hz, (i0 + int(block_samples)) / fs_hz
            tacho = pulses[(pulses >= t0) & (pulses < t1)] - t0
        if speed_readings:
            out.append(SpeedReading(model.machine_id, ts, float(np.mean(speed[block]))))
        for p in points:
            out.append(
                Waveform(
                    machine=model.machine_id, point=p, ts=ts, fs_hz=float(fs_hz), unit=unit,
                    samples=records[p][block].copy(), reading_id=f"{model.machine_id}-{p}-{k}",
                    once_per_rev_s=tacho,
                )
            )
    return out


def iter_blocks(readings: Sequence[Waveform | SpeedReading]) -> Iterator[Waveform]:
    """The waveforms among ``readings``, in order."""
    return (r for r in readings if isinstance(r, Waveform))


def with_unbalance(model: MachineModel, unbalance_kg_m: float) -> MachineModel:
    """A copy of ``model`` with a different unbalance m*e (kg m)."""
    return replace(model, unbalance_kg_m=float(unbalance_kg_m))
