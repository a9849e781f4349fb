"""Bounds of a machine registry entry: what a mode, a point and a machine may hold.

Every door into the registry (the TOML file, the database, the dashboard's mode edits)
calls :func:`check_machine`, :func:`check_point` or :func:`check_mode`; each returns the
entry or raises :class:`~monitor.model.registry.RegistryError` whose one sentence names the
machine, the entry and the key. The bounds and their reasons are in docs/registry.md.
"""

from __future__ import annotations

import datetime as _dt
import math
import re
from collections.abc import Mapping, Sequence
from typing import Any

from monitor.model.bearing_geometry import BearingGeometry
from monitor.model.detection_settings import DetectionSettings
from monitor.model.registry import (
    DIRECTIONS,
    MACHINE_CLASSES,
    Machine,
    Mode,
    Point,
    RegistryError,
)
from monitor.model.units import QUANTITIES, UNITS_BY_QUANTITY

#: A machine or point id: what may appear in an MQTT topic and a URL unquoted.
ID_PATTERN = re.compile(r"^[A-Za-z0-9_-]{1,64}$")
#: Natural frequencies a mode may have, Hz. Below 0.1 Hz (one cycle in ten seconds) lie
#: no structural modes of machines and their supports, and a spectrum of a few seconds'
#: block cannot resolve them; above 100 kHz lies beyond the band of accelerometers used on
#: machinery (tens of kHz) and of the sample rates the service analyses. docs/registry.md.
MODE_FREQUENCY_RANGE_HZ = (0.1, 100_000.0)
#: Highest running speed, r/min: above the fastest machine rotors (turbomolecular pumps,
#: high-speed spindles and turbines: some 10^5 r/min). docs/registry.md.
MAX_SPEED_RPM = 1_000_000.0
#: Highest excitation order: tooth and blade counts run to a few hundred. docs/registry.md.
MAX_EXCITATION_ORDER = 1000.0
#: Highest supply (line) frequency, Hz: mains are 16.7-400 Hz, drives of high-speed
#: motors some kHz. docs/registry.md.
MAX_LINE_FREQUENCY_HZ = 10_000.0
#: Longest name, location or source text (the store's column width).
MAX_TEXT = 200
#: A text that is not blank holds a character outside this class: the characters Python's
#: ``str.strip`` removes (``str.isspace``), written as a regular expression both Python and
#: JSON Schema (ECMA-262) read alike, so dashboard/openapi.json states the same rule.
NOT_BLANK = r"[^\t\n\u000b\f\r\u001c-\u001f \u0085\u00a0\u1680\u2000-\u200a\u2028\u2029\u202f\u205f\u3000]"


def entry_label(machine_id: str | None, extra: str = "") -> str:
    """How a message names a registry entry: ``machine 'fan-1'`` plus ``extra`` (e.g.
    ``", mode 'sway'"``), or ``a machine entry`` before the id is known."""
    base = f"machine {machine_id!r}" if machine_id else "a machine entry"
    return f"{base}{extra}"


def quoted(value: Any, limit: int = 60) -> str:
    """A bad value as an error message quotes it: its repr, cut to ``limit`` characters
    (a 400-digit number would drown the sentence)."""
    text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


def number(value: Any, where: str, key: str) -> float:
    """``value`` as a finite float; RegistryError naming ``key`` otherwise."""
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise RegistryError(f"{where}: '{key}' must be a number, got {quoted(value)}.")
    try:
        v = float(value)
    except OverflowError:  # a whole number beyond any float (JSON allows 10**400)
        raise RegistryError(f"{where}: '{key}' is absurdly large, got {quoted(value)}.") from None
    if not math.isfinite(v):
        raise RegistryError(f"{where}: '{key}' must be a finite number, got {value!r}.")
    return v


def _within(value: Any, where: str, key: str, lo: float, hi: float, *, lo_open: bool = False,
            hi_open: bool = False, unit: str = "") -> float:
    """``value`` as a float inside [lo, hi] (an end excluded when ``*_open``); else a
    RegistryError naming ``key`` and the range."""
    v = number(value, where, key)
    if (v > lo if lo_open else v >= lo) and (v < hi if hi_open else v <= hi):
        return v
    left, right = "(" if lo_open else "[", ")" if hi_open else "]"
    hi_text = "inf" if hi == math.inf else f"{hi:g}"
    raise RegistryError(
        f"{where}: '{key}' must lie in {left}{lo:g}, {hi_text}{right}{unit}, got {value!r}."
    )


def _positive(value: Any, where: str, key: str, hi: float = math.inf, unit: str = "") -> float:
    return _within(value, where, key, 0.0, hi, lo_open=True, unit=unit)


def _text(value: Any, where: str, key: str) -> str:
    s = str(value)
    if len(s) > MAX_TEXT:
        raise RegistryError(f"{where}: '{key}' must be at most {MAX_TEXT} characters, got {len(s)}.")
    return s


def check_zone_limits(limits: Sequence[float], field: str = "limits_mm_s") -> tuple[float, float, float]:
    """Three increasing positive zone boundaries [A/B, B/C, C/D] in mm/s RMS as floats
    (ISO 20816-3 zones); ValueError naming ``field`` otherwise."""
    if len(limits) != 3:
        raise ValueError(f"{field} must be three numbers [A/B, B/C, C/D] in mm/s RMS, got {list(limits)!r}.")
    ab, bc, cd = (float(v) for v in limits)
    if not all(math.isfinite(v) and v > 0 for v in (ab, bc, cd)):
        raise ValueError(f"{field} must be positive finite mm/s RMS values, got {list(limits)!r}.")
    if not ab < bc < cd:
        raise ValueError(
            f"{field} zone boundaries overlap: need A/B < B/C < C/D, got {list(limits)!r}."
        )
    return ab, bc, cd


def limits_mm_s(value: Any, where: str, key: str) -> tuple[float, float, float] | None:
    """Three zone boundaries [A/B, B/C, C/D] in mm/s RMS, or None; RegistryError naming
    ``key`` otherwise."""
    if value is None:
        return None
    if not isinstance(value, list | tuple) or len(value) != 3:
        raise RegistryError(
            f"{where}: '{key}' must be three numbers [A/B, B/C, C/D] in mm/s RMS, got {value!r}."
        )
    numbers = [number(v, where, key) for v in value]
    try:
        return check_zone_limits(numbers, f"'{key}'")
    except ValueError as exc:
        raise RegistryError(f"{where}: {exc}") from exc


def check_machine_id(machine_id: Any) -> str:
    """A machine id: 1-64 letters, digits, '-' or '_'; RegistryError otherwise."""
    if not isinstance(machine_id, str) or not ID_PATTERN.match(machine_id):
        raise RegistryError(
            f"a machine entry: 'id' must be 1-64 letters, digits, '-' or '_', got {machine_id!r}."
        )
    return machine_id


def check_mode(mode: Mode, machine_id: str | None = None) -> Mode:
    """The physical bounds of a mode (docs/registry.md); returns it, or RegistryError
    naming the machine, the mode and the key. Every door calls this, through
    :func:`parse_mode` or directly."""
    name = mode.name
    where = entry_label(machine_id, f", mode {name!r}" if name else ", a mode")
    if not isinstance(name, str) or not name.strip():
        raise RegistryError(f"{where}: 'name' is required.")
    _text(name, where, "name")
    lo, hi = MODE_FREQUENCY_RANGE_HZ
    _within(mode.frequency_hz, where, "frequency_hz", lo, hi, unit=" Hz")
    if mode.damping_ratio is not None:
        _within(mode.damping_ratio, where, "damping_ratio", 0.0, 1.0, lo_open=True, hi_open=True)
    if mode.amplification_factor is not None:
        _within(mode.amplification_factor, where, "amplification_factor", 1.0, math.inf)
    if mode.required_margin_pct is not None:
        _within(mode.required_margin_pct, where, "required_margin_pct", 0.0, 100.0, hi_open=True,
                unit=" %")
    _text(mode.source, where, "source")
    if mode.date is not None and not isinstance(mode.date, _dt.date):
        raise RegistryError(f"{where}: 'date' must be a date, got {mode.date!r}.")
    return mode


def check_point(point: Point, machine_id: str | None = None) -> Point:
    """The bounds of a measurement point; returns it, or RegistryError naming the key."""
    pid = point.id
    where = entry_label(machine_id, f", point {pid!r}" if pid else ", a point")
    if not isinstance(pid, str) or not ID_PATTERN.match(pid):
        raise RegistryError(
            f"{where}: 'id' must be 1-64 letters, digits, '-' or '_', got {pid!r}."
        )
    if point.direction not in DIRECTIONS:
        raise RegistryError(
            f"{where}: 'direction' must be one of {DIRECTIONS}, got {point.direction!r}.")
    if point.quantity not in QUANTITIES:
        raise RegistryError(
            f"{where}: 'quantity' must be one of {QUANTITIES}, got {point.quantity!r}.")
    allowed = UNITS_BY_QUANTITY[point.quantity]
    if point.unit not in allowed:
        raise RegistryError(
            f"{where}: 'unit' for {point.quantity} must be one of {allowed}, got {point.unit!r}.")
    if point.fs_hz is not None:
        _positive(point.fs_hz, where, "fs_hz", unit=" Hz")
    limits_mm_s(point.limits_mm_s, where, "limits_mm_s")
    return point


def check_machine(machine: Machine) -> Machine:
    """The bounds of a machine, its points, its modes and its settings (detection
    settings, bearing geometry); returns it, or RegistryError naming the machine, the
    entry and the key."""
    mid = check_machine_id(machine.id)
    where = entry_label(mid)
    _text(machine.name, where, "name")
    _text(machine.location, where, "location")
    if machine.machine_class not in MACHINE_CLASSES:
        raise RegistryError(
            f"{where}: 'class' must be one of {MACHINE_CLASSES}, got {machine.machine_class!r}.")
    sr = machine.speed_range_rpm
    if not isinstance(sr, list | tuple) or len(sr) != 2:
        raise RegistryError(f"{where}: 'speed_range_rpm' must be [min, max] in r/min, got {sr!r}.")
    lo = _positive(sr[0], where, "speed_range_rpm", MAX_SPEED_RPM, " r/min")
    hi = _positive(sr[1], where, "speed_range_rpm", MAX_SPEED_RPM, " r/min")
    if not lo < hi:
        raise RegistryError(
            f"{where}: 'speed_range_rpm' minimum must be below maximum, got {list(sr)!r}.")
    orders = machine.excitation_orders
    if not isinstance(orders, list | tuple) or not orders:
        raise RegistryError(
            f"{where}: 'excitation_orders' must be a non-empty list of positive numbers, "
            f"got {orders!r}.")
    for o in orders:
        _positive(o, where, "excitation_orders", MAX_EXCITATION_ORDER)
    if machine.line_frequency_hz is not None:
        _positive(machine.line_frequency_hz, where, "line_frequency_hz", MAX_LINE_FREQUENCY_HZ,
                  " Hz")
    limits_mm_s(machine.limits_mm_s, where, "limits_mm_s")
    for p in machine.points:
        check_point(p, mid)
    ids = [p.id for p in machine.points]
    if len(set(ids)) != len(ids):
        raise RegistryError(f"{where}: point ids must be unique, got {ids!r}.")
    for m in machine.modes:
        check_mode(m, mid)
    names = [m.name for m in machine.modes]
    if len(set(names)) != len(names):
        raise RegistryError(f"{where}: mode names must be unique, got {names!r}.")
    _check_settings(machine.settings, where)
    _check_min_running_speed(machine.settings, hi, where)
    return machine


def _check_min_running_speed(settings: Mapping[str, Any], top_rpm: float, where: str) -> None:
    """``min_running_speed_hz`` (validated as a number by the detection settings) must lie
    below the top of the operating range, or the machine would never count as running."""
    v = settings.get("min_running_speed_hz")
    if v is not None and isinstance(v, int | float) and v * 60.0 >= top_rpm:
        raise RegistryError(f"{where}: 'min_running_speed_hz' must be below the top of speed_range_rpm "
                            f"({top_rpm / 60.0:g} Hz), got {v!r}.")


def _check_settings(settings: Mapping[str, Any], where: str) -> None:
    if not isinstance(settings, Mapping):
        raise RegistryError(f"{where}: settings must be a table, got {settings!r}.")
    try:
        DetectionSettings.from_mapping(settings, where)
    except RegistryError:
        raise
    except (ValueError, TypeError) as exc:
        raise RegistryError(str(exc) if str(exc).startswith(where) else f"{where}: {exc}") from exc
    try:
        BearingGeometry.from_settings(settings)
    except (ValueError, TypeError) as exc:
        raise RegistryError(f"{where}: {exc}") from exc
