"""Vibration units: the one unit table, conversions, and sinusoid amplitude measures.

Units (docs/mqtt.md, docs/registry.md): acceleration ``m/s^2`` and ``g``, velocity
``mm/s`` and ``in/s``, displacement ``um`` and ``mil``. Every unit check of the code reads
this table: the registry's point units, the ingest of readings, the analysis, the
simulator's output units. Conversions stay within one quantity; moving between
quantities (integration, differentiation) is a frequency-domain operation that lives in
:mod:`monitor.analysis.spectrum`. A hammer's force channel carries one of
:data:`FORCE_UNITS` (a label only: the impact test never converts force).

Amplitude measures of a sinusoid: ``peak``, ``rms`` (peak / sqrt 2) and ``peak-to-peak``
(2 x peak).

References
----------
Standard acceleration of gravity g = 9.80665 m/s^2 exactly (3rd CGPM, 1901; SI Brochure);
1 in = 25.4 mm exactly (international yard and pound agreement, 1959); both as in
``scipy.constants``.
"""

from __future__ import annotations

import math
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike
from scipy import constants

Quantity = Literal["acceleration", "velocity", "displacement"]
QUANTITIES: tuple[Quantity, ...] = ("acceleration", "velocity", "displacement")

#: unit -> (quantity, factor to the quantity's base unit). Bases: m/s^2, mm/s, um. The
#: first unit of each quantity is its base unit.
_UNITS: dict[str, tuple[Quantity, float]] = {
    "m/s^2": ("acceleration", 1.0),
    "g": ("acceleration", constants.g),
    "mm/s": ("velocity", 1.0),
    "in/s": ("velocity", constants.inch * 1e3),
    "um": ("displacement", 1.0),
    "mil": ("displacement", constants.inch * 1e6 * 1e-3),  # 1 mil = 0.001 in = 25.4 um
}
UNITS = tuple(_UNITS)
#: Every unit a waveform may carry, and the quantity it measures.
UNIT_QUANTITY: dict[str, Quantity] = {u: q for u, (q, _) in _UNITS.items()}
#: The units of each quantity, its base unit first.
UNITS_BY_QUANTITY: dict[Quantity, tuple[str, ...]] = {
    q: tuple(u for u, (uq, _) in _UNITS.items() if uq == q) for q in QUANTITIES
}
BASE_UNIT: dict[Quantity, str] = {q: UNITS_BY_QUANTITY[q][0] for q in QUANTITIES}
#: quantity -> factor from its SI unit (m/s^2, m/s, m) to its base unit (m/s^2, mm/s, um).
_SI_TO_BASE: dict[Quantity, float] = {"acceleration": 1.0, "velocity": 1e3, "displacement": 1e6}
#: Units a hammer (force) channel may carry.
FORCE_UNITS = ("N", "kN", "lbf")
AMPLITUDE_KINDS = ("peak", "rms", "peak-to-peak")
_TO_PEAK = {"peak": 1.0, "rms": math.sqrt(2.0), "peak-to-peak": 0.5}


def check_unit(unit: object, name: str = "unit") -> str:
    """``unit`` when it is a vibration unit of the table; ValueError naming ``name``, the
    value and the allowed units otherwise."""
    if unit not in _UNITS:
        raise ValueError(f"{name} {unit!r} is not a known unit; allowed: {', '.join(UNITS)}.")
    return unit  # type: ignore[return-value]  # a key of _UNITS is a str


def check_quantity(quantity: object, name: str = "quantity") -> Quantity:
    """``quantity`` when it is ``acceleration``, ``velocity`` or ``displacement``;
    ValueError naming ``name`` and the value otherwise."""
    if quantity not in QUANTITIES:
        raise ValueError(f"{name} must be one of {QUANTITIES}, got {quantity!r}.")
    return quantity  # type: ignore[return-value]  # a member of QUANTITIES


def quantity_of(unit: str) -> Quantity:
    """Return the quantity (``acceleration``, ``velocity``, ``displacement``) of ``unit``."""
    return _UNITS[check_unit(unit)][0]


def to_base_factor(unit: str) -> float:
    """Factor that turns a value in ``unit`` into the quantity's base unit (m/s^2, mm/s, um)."""
    return _UNITS[check_unit(unit)][1]


def from_si_factor(unit: str) -> float:
    """Factor that turns a value of ``unit``'s quantity in SI (m/s^2, m/s, m) into ``unit``."""
    quantity, factor = _UNITS[check_unit(unit)]
    return _SI_TO_BASE[quantity] / factor


def convert(values: ArrayLike, from_unit: str, to_unit: str) -> np.ndarray | float:
    """Convert ``values`` from ``from_unit`` to ``to_unit`` of the same quantity.

    Parameters
    ----------
    values : float or array_like
        Values in ``from_unit``.
    from_unit, to_unit : str
        Units of the same quantity (see :data:`UNITS`).

    Returns
    -------
    float or numpy.ndarray
        Values in ``to_unit`` (a float for scalar input).

    Raises
    ------
    ValueError
        Unknown unit, or units of different quantities.
    """
    q_from, f_from = _UNITS[check_unit(from_unit, "from_unit")]
    q_to, f_to = _UNITS[check_unit(to_unit, "to_unit")]
    if q_from != q_to:
        raise ValueError(
            f"to_unit {to_unit!r} measures {q_to} but from_unit {from_unit!r} measures "
            f"{q_from}; convert between quantities by integrating the spectrum."
        )
    factor = f_from / f_to
    if np.ndim(values) == 0:
        return float(values) * factor  # type: ignore[arg-type]
    return np.asarray(values, dtype=float) * factor


def convert_amplitude(values: ArrayLike, from_kind: str, to_kind: str) -> np.ndarray | float:
    """Convert a sinusoid's amplitude between ``peak``, ``rms`` and ``peak-to-peak``.

    Valid for a single sinusoid only: peak = sqrt(2) x RMS, peak-to-peak = 2 x peak.
    """
    for name, kind in (("from_kind", from_kind), ("to_kind", to_kind)):
        if kind not in _TO_PEAK:
            raise ValueError(
                f"{name} {kind!r} is not an amplitude measure; allowed: "
                f"{', '.join(AMPLITUDE_KINDS)}."
            )
    factor = _TO_PEAK[from_kind] / _TO_PEAK[to_kind]
    if np.ndim(values) == 0:
        return float(values) * factor  # type: ignore[arg-type]
    return np.asarray(values, dtype=float) * factor


def peak_to_rms(values: ArrayLike) -> np.ndarray | float:
    """Sinusoid peak -> RMS (divide by sqrt 2)."""
    return convert_amplitude(values, "peak", "rms")


def rms_to_peak(values: ArrayLike) -> np.ndarray | float:
    """Sinusoid RMS -> peak (multiply by sqrt 2)."""
    return convert_amplitude(values, "rms", "peak")


def peak_to_pp(values: ArrayLike) -> np.ndarray | float:
    """Sinusoid peak -> peak-to-peak (double)."""
    return convert_amplitude(values, "peak", "peak-to-peak")


def pp_to_peak(values: ArrayLike) -> np.ndarray | float:
    """Sinusoid peak-to-peak -> peak (halve)."""
    return convert_amplitude(values, "peak-to-peak", "peak")


def velocity_mm_s_from(amplitude: ArrayLike, unit: str, freq_hz: ArrayLike) -> np.ndarray | float:
    """Velocity amplitude (mm/s) of a sinusoid of ``amplitude`` in ``unit`` at ``freq_hz``.

    Acceleration is divided by 2 pi f, displacement multiplied by it; the amplitude measure
    (peak, RMS) is kept. Zero frequency gives 0 for acceleration.

    References
    ----------
    V = A / (j 2 pi f), V = j 2 pi f D for a sinusoid (any vibration handbook).
    """
    quantity, factor = _UNITS[check_unit(unit)]
    a = np.asarray(amplitude, dtype=float) * factor
    omega = 2.0 * np.pi * np.asarray(freq_hz, dtype=float)
    if quantity == "velocity":
        out = a
    elif quantity == "acceleration":
        with np.errstate(divide="ignore", invalid="ignore"):
            out = np.where(omega > 0, a * 1e3 / np.where(omega > 0, omega, 1.0), 0.0)
    else:
        out = a * omega * 1e-3
    return float(out) if np.ndim(out) == 0 else out
