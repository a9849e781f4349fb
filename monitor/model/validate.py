"""Argument checks at the boundary of the pure code, written once and used everywhere.

Each check returns the value in its working type (a float, an int, a pair of floats, a
float64 array) or raises ValueError with one sentence naming the parameter, the value
given and what is allowed. ``name`` is what the caller calls the parameter: a keyword
(``fs_hz``), a path into a structure (``modes[2].damping_ratio``) or a command-line
option (``--tolerance``), so the message reads right wherever it surfaces.

Numbers are Python or NumPy reals; ``True`` and ``False`` are refused (a JSON or TOML
boolean is never a measurement), and so are strings. The checks are cheap enough for the
per-reading path: a type test and one or two comparisons.

Checks of a machine registry entry live in :mod:`monitor.model.bounds` (their messages
name the machine and the key); the unit vocabulary is :func:`monitor.model.units.check_unit`.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

_REAL = (int, float, np.integer, np.floating)


def _real(value: Any, name: str, allowed: str) -> float:
    """``value`` as a float when it is a real number (not a bool), else ValueError."""
    if isinstance(value, bool) or not isinstance(value, _REAL):
        raise ValueError(f"{name} must be {allowed}, got {value!r}.")
    return float(value)


def finite(value: Any, name: str) -> float:
    """A finite real number."""
    v = _real(value, name, "a finite number")
    if not math.isfinite(v):
        raise ValueError(f"{name} must be a finite number, got {value!r}.")
    return v


def non_negative(value: Any, name: str) -> float:
    """A finite real number >= 0."""
    v = _real(value, name, "a finite number >= 0")
    if not (math.isfinite(v) and v >= 0):
        raise ValueError(f"{name} must be a finite number >= 0, got {value!r}.")
    return v


def positive(value: Any, name: str) -> float:
    """A finite real number > 0."""
    v = _real(value, name, "a finite number > 0")
    if not (math.isfinite(v) and v > 0):
        raise ValueError(f"{name} must be a finite number > 0, got {value!r}.")
    return v


def in_range(
    value: Any, name: str, low: float, high: float, *, low_open: bool = True,
    high_open: bool = True, unit: str = "",
) -> float:
    """A real number inside the interval from ``low`` to ``high``, each end excluded
    (``*_open``, the default) or included; ``unit`` (e.g. ``" %"``) follows the interval
    in the message."""
    left, right = "(" if low_open else "[", ")" if high_open else "]"
    allowed = f"a number in {left}{low:g}, {high:g}{right}{unit}"
    v = _real(value, name, allowed)
    if (v > low if low_open else v >= low) and (v < high if high_open else v <= high):
        return v
    raise ValueError(f"{name} must lie in {left}{low:g}, {high:g}{right}{unit}, got {value!r}.")


def whole_number(value: Any, name: str, *, minimum: int = 1, maximum: int | None = None) -> int:
    """An integer (Python or NumPy, not a bool) from ``minimum`` up to ``maximum``."""
    ok = not isinstance(value, bool) and isinstance(value, int | np.integer)
    if ok and value >= minimum and (maximum is None or value <= maximum):
        return int(value)
    allowed = (f"a whole number >= {minimum}" if maximum is None
               else f"a whole number from {minimum} to {maximum}")
    raise ValueError(f"{name} must be {allowed}, got {value!r}.")


def frequency_hz(value: Any, name: str, *, positive: bool = False) -> float:
    """A finite frequency in Hz, >= 0 (or > 0 with ``positive``)."""
    kind = "positive" if positive else "non-negative"
    v = _real(value, name, f"a {kind} finite frequency in Hz")
    if not math.isfinite(v) or v < 0 or (positive and v == 0):
        raise ValueError(f"{name} must be a {kind} finite frequency in Hz, got {value!r}.")
    return v


def sample_rate_hz(value: Any, name: str = "fs_hz") -> float:
    """A positive, finite sample rate in Hz."""
    v = _real(value, name, "a positive finite sample rate in Hz")
    if not (math.isfinite(v) and v > 0):
        raise ValueError(f"{name} must be a positive finite sample rate in Hz, got {value!r}.")
    return v


def ordered_pair(
    value: Any, name: str, unit: str = "Hz", *, allow_equal: bool = False
) -> tuple[float, float]:
    """Two finite numbers ``(low, high)`` with ``0 <= low < high`` (``low <= high`` with
    ``allow_equal``), in ``unit``: a frequency band, a speed range."""
    try:
        lo_raw, hi_raw = value
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a pair (low, high) in {unit}, got {value!r}.") from None
    rel = "<=" if allow_equal else "<"
    allowed = f"a pair of numbers with 0 <= low {rel} high (finite, {unit})"
    lo = _real(lo_raw, name, allowed)
    hi = _real(hi_raw, name, allowed)
    if math.isfinite(lo) and math.isfinite(hi) and lo >= 0 and (lo <= hi if allow_equal else lo < hi):
        return lo, hi
    raise ValueError(f"{name} must satisfy 0 <= low {rel} high (finite, {unit}), got {value!r}.")


def real_samples(samples: ArrayLike, name: str = "samples", *, minimum: int = 1) -> np.ndarray:
    """A 1-D array of at least ``minimum`` finite real numbers, as float64 (no copy when
    it already is)."""
    x = np.asarray(samples)
    if x.ndim != 1:
        raise ValueError(f"{name} must be a 1-D array, got shape {x.shape}.")
    if x.size < minimum:
        raise ValueError(f"{name} has {x.size} values; at least {minimum} samples are needed.")
    if not np.issubdtype(x.dtype, np.number) or np.iscomplexobj(x):
        raise ValueError(f"{name} must be real numbers, got dtype {x.dtype}.")
    x = x.astype(np.float64, copy=False)
    if not np.isfinite(x).all():
        bad = int(np.flatnonzero(~np.isfinite(x))[0])
        raise ValueError(f"{name} must be finite; sample {bad} is {float(x[bad])!r}.")
    return x
