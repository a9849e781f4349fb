"""The symptoms the likely-cause hints read (monitor/detection/causes.py), measured from
what the service stores for a reading: its order amplitudes, its growth features, its zone
limits and, when one is at hand, its velocity spectrum.

One builder (:func:`point_symptoms`) takes the stored JSON forms, so the service (at an
alarm transition, from the reading it has just analysed) and the dashboard (from the rows
the reads return) measure the same symptoms the same way.

Units: velocities in mm/s RMS (the stored orders and spectra are peak values, divided by
sqrt 2 here), frequencies in Hz, line prominence in dB over the spectrum's local floor.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from monitor.detection.features import BEARING_NOISE_DB
from monitor.model.bearing_geometry import BearingGeometry

#: A spectral line counts as present when it stands this far over the local floor (the
#: median of the spectrum around it), dB: a bin of random noise (Rayleigh-distributed
#: amplitude) exceeds k times its median with probability 2^(-k^2), about 1e-3 at 10 dB
#: (k^2 = 10; Rayleigh distribution, from memory).
LINE_PRESENT_DB = 10.0

#: Half-width of the search for a line, as a fraction of its frequency (speed ripple and
#: slip; common practice) and at least this many bins of the spectrum.
LINE_SEARCH_FRACTION = 0.01
LINE_SEARCH_BINS = 2.0

#: Half-width of the window whose median is a line's local floor: this fraction of the
#: line's frequency, at least this many bins (common practice).
FLOOR_WINDOW_FRACTION = 0.2
FLOOR_WINDOW_BINS = 10.0

#: Whole orders read for the harmonic series (2x-10x) and the half orders read for
#: subharmonic content (common practice: looseness shows harmonics to 10x and beyond,
#: and half orders).
HARMONIC_ORDERS = tuple(float(k) for k in range(2, 11))
HALF_ORDERS = (0.5, 1.5, 2.5, 3.5)

_SQRT2 = math.sqrt(2.0)


@dataclass(frozen=True)
class Line:
    """One spectral line: ``hz`` where it was read, ``mm_s_rms`` its velocity (mm/s RMS),
    ``prominence_db`` over the local floor (dB), ``present`` when at least
    :data:`LINE_PRESENT_DB`."""

    hz: float
    mm_s_rms: float
    prominence_db: float

    @property
    def present(self) -> bool:
        return self.prominence_db >= LINE_PRESENT_DB


@dataclass(frozen=True)
class FeatureState:
    """A growth feature of the reading as the growth rules judged it: ``value`` in
    ``unit``, ``ratio`` over its baseline (None while learning), ``growing`` when the
    rules raise or hold an alarm level on it (monitor/detection/growth_rules.py)."""

    value: float
    unit: str
    ratio: float | None
    growing: bool
    trend_per_day: float | None


@dataclass(frozen=True)
class PointSymptoms:
    """What one point's reading shows, for the cause rules.

    ``direction`` as in the registry ('horizontal', 'vertical', 'axial', ...);
    ``speed_hz`` running speed (Hz); ``overall_mm_s_rms`` the ISO 20816 band overall;
    ``zone_ab_mm_s`` and ``zone_bc_mm_s`` the zone A/B and B/C boundaries of the point
    (mm/s RMS, None when unknown); ``resolution_hz`` the spectrum's bin spacing (Hz);
    ``orders`` order -> velocity (mm/s RMS) of the stored orders (1x, 2x, the machine's
    excitation orders); ``harmonics`` and ``half_orders`` order -> :class:`Line` read from
    the velocity spectrum (empty without one); ``line_2f`` the line at twice the supply
    frequency (motors with a spectrum); ``features`` name -> :class:`FeatureState`;
    ``bearing_hz`` defect -> frequency (Hz) when the machine has a bearing geometry;
    ``bearing_velocity`` defect -> :class:`Line` of the defect frequency in the velocity
    spectrum; ``spectrum_ts`` the time of the spectrum read (epoch s), if any.
    """

    point: str
    direction: str
    speed_hz: float
    overall_mm_s_rms: float | None
    zone_ab_mm_s: float | None
    zone_bc_mm_s: float | None
    orders: Mapping[float, float]
    harmonics: Mapping[float, Line] = field(default_factory=dict)
    half_orders: Mapping[float, Line] = field(default_factory=dict)
    line_2f: Line | None = None
    line_frequency_hz: float | None = None
    features: Mapping[str, FeatureState] = field(default_factory=dict)
    bearing_hz: Mapping[str, float] = field(default_factory=dict)
    bearing_velocity: Mapping[str, Line] = field(default_factory=dict)
    spectrum_ts: float | None = None
    resolution_hz: float | None = None

    @property
    def axial(self) -> bool:
        return self.direction.strip().lower() == "axial"

    def order_mm_s(self, order: float) -> float | None:
        """Velocity at ``order`` (mm/s RMS) from the stored orders, else from the spectrum."""
        for o, v in self.orders.items():
            if abs(o - order) < 1e-6:
                return v
        line = self.harmonics.get(order) or self.half_orders.get(order)
        return None if line is None else line.mm_s_rms

    def above_zone_a(self) -> bool:
        """Whether the overall level lies above the zone A/B boundary (ISO 20816-1: zone A
        is the level of a newly commissioned machine)."""
        return (self.overall_mm_s_rms is not None and self.zone_ab_mm_s is not None
                and self.overall_mm_s_rms > self.zone_ab_mm_s)

    def in_zone_c_or_d(self) -> bool:
        """Whether the overall level lies above the zone B/C boundary (ISO 20816-1: zone C
        is unsatisfactory for long-term continuous operation)."""
        return (self.overall_mm_s_rms is not None and self.zone_bc_mm_s is not None
                and self.overall_mm_s_rms > self.zone_bc_mm_s)

    def bearing_db(self, defect: str) -> float | None:
        """The envelope line of ``defect`` over the envelope floor, dB (the feature's
        prominence; values at the clamp :data:`BEARING_NOISE_DB` read as no line)."""
        f = self.features.get(f"bearing_{defect}")
        if f is None or not (f.value > 0 and math.isfinite(f.value)):
            return None
        db = 20.0 * math.log10(f.value)
        return db if db > BEARING_NOISE_DB + 1e-9 else None


def bearing_orders(settings: Mapping[str, Any] | None) -> dict[str, float] | None:
    """Defect -> order of shaft speed of the bearing geometry in a machine's ``settings``
    (kinematic formulas, monitor/model/bearing_geometry.py); None without a usable one."""
    try:
        geometry = BearingGeometry.from_settings(settings or {})
    except ValueError:
        return None
    return None if geometry is None else geometry.orders().as_dict()


def read_line(freq_hz: np.ndarray, mm_s_peak: np.ndarray, at_hz: float, *, bins_only: bool = False
              ) -> Line | None:
    """The largest bin within the search half-width around ``at_hz`` of a velocity
    spectrum (``freq_hz`` evenly spaced, Hz; ``mm_s_peak`` mm/s peak), as a :class:`Line`
    in mm/s RMS with its prominence over the local median floor (``bins_only``: the
    half-width in bins alone, for a line whose frequency does not slip, such as the
    supply's); None outside the spectrum."""
    if freq_hz.size < 3 or not (math.isfinite(at_hz) and at_hz > 0):
        return None
    df = float(freq_hz[1] - freq_hz[0])
    if df <= 0 or at_hz > float(freq_hz[-1]):
        return None
    half = LINE_SEARCH_BINS * df if bins_only else max(LINE_SEARCH_BINS * df, LINE_SEARCH_FRACTION * at_hz)
    near = (freq_hz >= at_hz - half) & (freq_hz <= at_hz + half)
    if not near.any():
        return None
    idx = np.flatnonzero(near)
    k = int(idx[np.argmax(mm_s_peak[idx])])
    wide = max(FLOOR_WINDOW_BINS * df, FLOOR_WINDOW_FRACTION * at_hz)
    window = (freq_hz >= at_hz - wide) & (freq_hz <= at_hz + wide) & (freq_hz > 0)
    floor = float(np.median(mm_s_peak[window])) if window.any() else 0.0
    peak = float(mm_s_peak[k])
    prominence = 20.0 * math.log10(peak / floor) if floor > 0 and peak > 0 else 0.0
    return Line(float(freq_hz[k]), peak / _SQRT2, prominence)


def _features(features: Sequence[Mapping[str, Any]]) -> dict[str, FeatureState]:
    out = {}
    for f in features:
        name, value = f.get("name"), f.get("value")
        if not isinstance(name, str) or not isinstance(value, int | float) or not math.isfinite(value):
            continue
        ratio = f.get("ratio")
        trend = f.get("trend_per_day")
        out[name] = FeatureState(
            float(value), str(f.get("unit") or ""),
            float(ratio) if isinstance(ratio, int | float) and math.isfinite(ratio) else None,
            f.get("raise_level") is not None or f.get("hold_level") is not None,
            float(trend) if isinstance(trend, int | float) and math.isfinite(trend) else None)
    return out


def point_symptoms(
    point: str,
    direction: str,
    *,
    speed_hz: float | None,
    overall_mm_s_rms: float | None,
    zone_limits_mm_s: Sequence[float] | None,
    orders: Sequence[Mapping[str, Any]],
    features: Sequence[Mapping[str, Any]] = (),
    spectrum: tuple[np.ndarray, np.ndarray] | None = None,
    spectrum_ts: float | None = None,
    line_frequency_hz: float | None = None,
    bearing_orders: Mapping[str, float] | None = None,
) -> PointSymptoms | None:
    """The symptoms of one point's reading from its stored forms; None without a speed.

    ``orders`` the stored order rows (``order``, ``velocity_mm_s`` peak); ``features`` the
    stored growth features (``FeatureEvaluation.to_json``); ``zone_limits_mm_s`` (A/B,
    B/C, C/D) mm/s RMS; ``spectrum`` (frequencies Hz, velocity mm/s peak) of the same
    point, or None; ``bearing_orders`` defect -> order of shaft speed
    (:meth:`~monitor.model.bearing_geometry.BearingGeometry.orders`)."""
    if speed_hz is None or not (math.isfinite(speed_hz) and speed_hz > 0):
        return None
    by_order = {}
    for o in orders:
        order, v = o.get("order"), o.get("velocity_mm_s")
        if isinstance(order, int | float) and isinstance(v, int | float) and math.isfinite(v):
            by_order[float(order)] = float(v) / _SQRT2
    harmonics: dict[float, Line] = {}
    halves: dict[float, Line] = {}
    line_2f = None
    bearing_hz = {d: float(o) * speed_hz for d, o in (bearing_orders or {}).items()}
    bearing_velocity: dict[str, Line] = {}
    if spectrum is not None:
        f, a = (np.asarray(x, dtype=float) for x in spectrum)
        for order in HARMONIC_ORDERS:
            if (line := read_line(f, a, order * speed_hz)) is not None:
                harmonics[order] = line
        for order in HALF_ORDERS:
            if (line := read_line(f, a, order * speed_hz)) is not None:
                halves[order] = line
        if line_frequency_hz:
            line_2f = read_line(f, a, 2.0 * line_frequency_hz, bins_only=True)
        for defect, hz in bearing_hz.items():
            if (line := read_line(f, a, hz)) is not None:
                bearing_velocity[defect] = line
    ab = float(zone_limits_mm_s[0]) if zone_limits_mm_s else None
    bc = float(zone_limits_mm_s[1]) if zone_limits_mm_s else None
    df = None
    if spectrum is not None and len(spectrum[0]) > 1:
        df = float(spectrum[0][1] - spectrum[0][0])
    overall = overall_mm_s_rms if overall_mm_s_rms is None or math.isfinite(overall_mm_s_rms) else None
    return PointSymptoms(
        point=point, direction=direction, speed_hz=float(speed_hz), overall_mm_s_rms=overall,
        zone_ab_mm_s=ab, zone_bc_mm_s=bc, resolution_hz=df, orders=by_order, harmonics=harmonics, half_orders=halves, line_2f=line_2f,
        line_frequency_hz=line_frequency_hz, features=_features(features), bearing_hz=bearing_hz,
        bearing_velocity=bearing_velocity, spectrum_ts=spectrum_ts if spectrum is not None else None)
