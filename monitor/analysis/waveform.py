"""Full analysis of one waveform: the contract every later stage reads.

``analyse_waveform`` composes the pure pieces (``spectrum``, ``speed``, ``orders``) into
one :class:`ReadingAnalysis`. Detection, the store, the CLI ``analyse`` command and the
dashboard all read this dataclass; extend it, don't break it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np

from monitor.analysis import bearings
from monitor.analysis import spectrum as sp
from monitor.analysis.orders import OrderAmplitude, normalise_orders, order_amplitudes
from monitor.analysis.record import Record, record_spectrum
from monitor.analysis.spectrum import Peak, Spectrum
from monitor.analysis.speed import estimate_speed, speed_from_pulse_train
from monitor.model import units, validate
from monitor.model.bearing_geometry import SETTINGS_KEYS, BearingGeometry
from monitor.model.jsonsafe import jsonable
from monitor.model.readings import Waveform
from monitor.model.registry import Machine, Point
from monitor.model.timefmt import iso_utc

__all__ = [
    "OrderAmplitude",
    "Peak",
    "ReadingAnalysis",
    "Spectrum",
    "analyse_waveform",
    "analysis_to_json",
    "severity_band_hz",
]

#: ISO 20816 broadband velocity band, Hz; 2-1000 Hz for machines that can run below
#: 600 r/min (ISO 10816-3:2009 / ISO 20816-3, section on measurement; from memory).
ISO_BAND_HZ = (10.0, 1000.0)
ISO_BAND_SLOW_HZ = (2.0, 1000.0)
SLOW_MACHINE_RPM = 600.0


@dataclass(frozen=True, eq=False)
class ReadingAnalysis:
    """Everything the analysis derives from one waveform.

    Attributes
    ----------
    machine, point : str
    ts : float
        Epoch seconds UTC of the block.
    speed_hz : float
        Running speed used, Hz (rev/s).
    speed_source : {'measured', 'estimated'}
    speed_uncertainty_hz : float
        One standard deviation of ``speed_hz``, Hz (0 when measured).
    overall_velocity_mm_s_rms : float
        Band-limited overall velocity, mm/s RMS (ISO 20816 band, default 10-1000 Hz).
    orders : tuple of OrderAmplitude
        1x, 2x and every excitation order of the machine, no duplicates, ascending;
        each with ``phase_deg`` (lag after the first once-per-revolution pulse, degrees)
        when the waveform had pulses, else None.
    one_x_normalised : float
        1x peak velocity (mm/s) divided by the square of running speed (Hz^2); an
        unbalance force grows with speed squared, so this stays flat with speed and rises
        with unbalance.
    peaks : tuple of Peak
        Largest spectral peaks (native unit, peak), largest first.
    spectrum : Spectrum
        Native-unit amplitude spectrum (peak scaling).
    velocity_spectrum : Spectrum
        Velocity amplitude spectrum, mm/s peak (integrated when the sensor is not a
        velocity sensor).
    reading_id : str or None
    envelope_spectrum : Spectrum or None
        The bearing envelope spectrum, m/s^2 peak, when the bearing analysis ran (kept as
        the evidence of a bearing feature's alarm transition).
    """

    machine: str
    point: str
    ts: float
    speed_hz: float
    speed_source: Literal["measured", "estimated"]
    speed_uncertainty_hz: float
    overall_velocity_mm_s_rms: float
    orders: tuple[OrderAmplitude, ...]
    one_x_normalised: float
    peaks: tuple[Peak, ...]
    spectrum: Spectrum
    velocity_spectrum: Spectrum
    reading_id: str | None = None
    extra: dict[str, Any] = field(default_factory=dict)
    envelope_spectrum: Spectrum | None = None

    def order(self, order: float) -> OrderAmplitude | None:
        """The amplitude at ``order`` (1.0 = 1x), or None if not computed."""
        for o in self.orders:
            if abs(o.order - order) < 1e-9:
                return o
        return None


def severity_band_hz(machine: Machine) -> tuple[float, float]:
    """ISO 20816 velocity band (Hz) for ``machine``: 10-1000 Hz, or 2-1000 Hz when its
    minimum speed is below 600 r/min (ISO 10816-3:2009 / ISO 20816-3; from memory)."""
    return ISO_BAND_SLOW_HZ if machine.speed_range_rpm[0] < SLOW_MACHINE_RPM else ISO_BAND_HZ


def _excitation_orders(machine: Machine) -> tuple[float, ...]:
    return normalise_orders((1.0, 2.0, *machine.excitation_orders))


def analyse_waveform(
    waveform: Waveform,
    machine: Machine,
    point: Point,
    *,
    once_per_rev_s: np.ndarray | None = None,
    band_hz: tuple[float, float] | None = None,
    peak_count: int = 10,
    harmonics: int = 8,
    bearing_band_hz: tuple[float, float] | None = None,
) -> ReadingAnalysis:
    """Analyse one waveform of ``point`` on ``machine``; see :class:`ReadingAnalysis`.

    Parameters
    ----------
    waveform : Waveform
        Samples in a unit of the point's quantity (converted to the point's unit).
    machine, point : Machine, Point
        Registry entries: speed range, excitation orders, sensor quantity and unit.
    once_per_rev_s : array_like, optional
        Once-per-revolution pulse times, seconds from the waveform's first sample;
        default the waveform's own ``once_per_rev_s``. They give the speed (two distinct
        pulses or more) and the phase reference of the orders (the first pulse).
    band_hz : (float, float), optional
        Overall velocity band, Hz; default :func:`severity_band_hz` (ISO 20816).
    peak_count : int
        Number of spectral peaks to report.
    harmonics : int
        Harmonics of running speed used to estimate the speed.
    bearing_band_hz : (float, float), optional
        Demodulation band (Hz) of the bearing envelope analysis; default the band of
        highest spectral kurtosis (:func:`monitor.analysis.bearings.choose_band`).

    Returns
    -------
    ReadingAnalysis
        Speed in Hz, overall velocity in mm/s RMS, orders in the point's unit (peak) and
        mm/s (peak) with their phase (degrees, lag after the first pulse) when there are
        pulses, peaks in the point's unit (peak). The speed is, by priority: the pulse
        train's (measured over the block itself, and the clock the phases are read
        against), the waveform's ``speed_hz`` (measured), the estimate from the spectrum.
        A pulse train too irregular to number the revolutions is left out and
        ``extra["once_per_rev_error"]`` says why. When the machine's settings carry
        a bearing geometry and the point measures acceleration, ``extra["bearing"]``
        holds :meth:`monitor.analysis.bearings.BearingAnalysis.to_json` (envelope amplitudes in
        m/s^2 peak, indicators in dB); when the geometry or the envelope analysis is
        unusable, ``extra["bearing_error"]`` holds the reason instead and the rest of
        the analysis stands.

    Raises
    ------
    ValueError
        Bad samples, sample rate or unit, a unit of another quantity than the point's, or
        a speed range that excludes every bin.

    References
    ----------
    Hann window and ENBW (Harris 1978); band RMS by Parseval; ISO 20816 velocity band
    (from memory); speed estimation and CRLB (Kay 1993, from memory); bearing envelope
    analysis (Randall and Antoni 2011; spectral kurtosis, Antoni 2006).
    """
    unit = waveform.unit
    units.check_unit(unit, "waveform unit")
    if units.quantity_of(unit) != point.quantity:
        raise ValueError(
            f"waveform unit {unit!r} measures {units.quantity_of(unit)} but point "
            f"{point.id!r} measures {point.quantity}."
        )
    fs = validate.sample_rate_hz(waveform.fs_hz)
    x = validate.real_samples(waveform.samples, "waveform samples", minimum=sp.MIN_SAMPLES)
    if unit != point.unit:
        x = x * (units.to_base_factor(unit) / units.to_base_factor(point.unit))
        unit = point.unit
    lo, hi = band_hz if band_hz is not None else severity_band_hz(machine)
    lo = validate.frequency_hz(lo, "band_hz low edge")
    hi = validate.frequency_hz(hi, "band_hz high edge")
    if hi < lo:
        raise ValueError(f"band_hz must run from low to high, got {band_hz!r}.")

    record = Record(x, fs)
    spec = record_spectrum(record, unit)
    vel = sp.to_velocity(spec, f_low_hz=lo)
    overall = sp.band_rms(vel, lo, min(hi, float(vel.freq_hz[-1])))

    extra: dict[str, Any] = {"unit": unit, "band_hz": (lo, hi)}
    pulses = once_per_rev_s if once_per_rev_s is not None else waveform.once_per_rev_s
    tach = None
    if pulses is not None:
        try:
            tach = speed_from_pulse_train(pulses)
        except ValueError as exc:
            # a miscounting key phasor must not cost the reading its spectrum and levels
            extra["once_per_rev_error"] = str(exc)
            pulses = None
    source: Literal["measured", "estimated"] = "measured"
    if tach is not None:
        speed, uncertainty = tach.speed_hz, tach.uncertainty_hz
    elif waveform.speed_hz is not None:
        speed = validate.frequency_hz(waveform.speed_hz, "waveform speed_hz", positive=True)
        uncertainty = 0.0
    else:
        # velocity shows 1x above the high-frequency content that dominates acceleration
        est = estimate_speed(
            vel, machine.speed_range_hz, harmonics=harmonics, samples=record
        )
        speed, source, uncertainty = est.speed_hz, "estimated", est.uncertainty_hz

    orders = order_amplitudes(
        record,
        fs,
        unit,
        speed,
        _excitation_orders(machine),
        once_per_rev_s=pulses,
    )
    one_x = next((o for o in orders if abs(o.order - 1.0) < 1e-9), None)
    one_x_norm = one_x.velocity_mm_s / speed**2 if one_x is not None else math.nan
    # skip the DC bin and the one next to it, where the removed mean and drift leak
    peaks = sp.find_peaks(spec, count=peak_count, min_hz=2.0 * spec.resolution_hz)
    envelope = None
    if point.quantity == "acceleration" and any(
        k in machine.settings for k in SETTINGS_KEYS
    ):
        # a bad geometry or a block too short for the envelope must not cost the reading
        # its spectrum, orders and overall level: report why and carry on
        try:
            geometry = BearingGeometry.from_settings(machine.settings)
            if geometry is not None:
                bearing = bearings.analyse_bearing(
                    record, None, speed, geometry, unit=unit, band_hz=bearing_band_hz
                )
                extra["bearing"] = bearing.to_json()
                envelope = bearing.envelope
        except ValueError as exc:
            extra["bearing_error"] = str(exc)
    return ReadingAnalysis(
        machine=waveform.machine,
        point=waveform.point,
        ts=float(waveform.ts),
        speed_hz=float(speed),
        speed_source=source,
        speed_uncertainty_hz=float(uncertainty),
        overall_velocity_mm_s_rms=overall,
        orders=orders,
        one_x_normalised=float(one_x_norm),
        peaks=peaks,
        spectrum=spec,
        velocity_spectrum=vel,
        reading_id=waveform.reading_id,
        extra=extra,
        envelope_spectrum=envelope,
    )


def _order_key(order: float) -> str:
    return f"{order:g}"


def analysis_to_json(a: ReadingAnalysis) -> dict[str, Any]:
    """JSON-ready dict of an analysis (the ``analyse --json`` record; README.md, docs/bearings.md).

    Keys: machine, point, ts (ISO 8601 UTC), speed_hz, speed_source,
    speed_uncertainty_hz, overall_velocity_mm_s_rms, orders (order as a string such as
    "1" or "9" -> amplitude in the point's unit, peak), peaks (list of {"hz",
    "amplitude"}), reading_id; plus unit, one_x_normalised and order_velocity_mm_s
    (order -> mm/s peak) and order_phase_deg (when a reference existed); bearing (the
    envelope analysis, docs/bearings.md) or bearing_error when the machine has a bearing
    geometry; once_per_rev_error when the pulse train was unusable.
    """
    out: dict[str, Any] = {
        "machine": a.machine,
        "point": a.point,
        "ts": iso_utc(a.ts, timespec="milliseconds"),
        "speed_hz": a.speed_hz,
        "speed_source": a.speed_source,
        "speed_uncertainty_hz": a.speed_uncertainty_hz,
        "overall_velocity_mm_s_rms": a.overall_velocity_mm_s_rms,
        "orders": {_order_key(o.order): o.amplitude for o in a.orders},
        "peaks": [{"hz": p.hz, "amplitude": p.amplitude} for p in a.peaks],
        "reading_id": a.reading_id,
        "unit": a.spectrum.unit,
        "one_x_normalised": jsonable(a.one_x_normalised),
        "order_velocity_mm_s": {_order_key(o.order): o.velocity_mm_s for o in a.orders},
    }
    if any(o.phase_deg is not None for o in a.orders):
        out["order_phase_deg"] = {_order_key(o.order): o.phase_deg for o in a.orders}
    if "bearing" in a.extra:
        out["bearing"] = a.extra["bearing"]
    if "bearing_error" in a.extra:
        out["bearing_error"] = a.extra["bearing_error"]
    if "once_per_rev_error" in a.extra:
        out["once_per_rev_error"] = a.extra["once_per_rev_error"]
    return out
