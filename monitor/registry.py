"""Machine registry: machines, measurement points, modes and limits.

The registry is plain data (frozen dataclasses). It is read from and written to the
TOML layout of DESIGN.md section 3 so a plant's set-up can be reviewed in version
control; the service keeps its working copy in the database (``monitor.store``).

Every validation error is a :class:`RegistryError` (a ``ValueError``) whose message names
the machine, the field and what was expected, in one sentence.
"""

from __future__ import annotations

import datetime as _dt
import math
import re
import tomllib
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

QUANTITIES = ("acceleration", "velocity", "displacement")
UNITS_BY_QUANTITY = {
    "acceleration": ("m/s^2", "g"),
    "velocity": ("mm/s", "in/s"),
    "displacement": ("um", "mil"),
}
DIRECTIONS = ("horizontal", "vertical", "axial", "radial")
MACHINE_CLASSES = ("group1/rigid", "group1/flexible", "group2/rigid", "group2/flexible")
_ID_PATTERN = re.compile(r"^[A-Za-z0-9_-]{1,64}$")


class RegistryError(ValueError):
    """A machine registry entry is invalid; the message names the entry and field."""


@dataclass(frozen=True)
class Mode:
    """A natural frequency of the machine and its support.

    Attributes
    ----------
    name : str
        What moves, e.g. "pedestal rocking".
    frequency_hz : float
        Natural frequency, Hz.
    damping_ratio : float or None
        Fraction of critical damping, 0 < zeta < 1.
    amplification_factor : float or None
        Peak response over static response (half-power definition), dimensionless.
    required_margin_pct : float or None
        Separation margin required, percent of the mode frequency; overrides the rule.
    source : str
        How it was found ("impact test", "run-up", "design calculation", ...).
    date : datetime.date or None
        When it was found.
    """

    name: str
    frequency_hz: float
    damping_ratio: float | None = None
    amplification_factor: float | None = None
    required_margin_pct: float | None = None
    source: str = ""
    date: _dt.date | None = None


@dataclass(frozen=True)
class Point:
    """A measurement point: one sensor on one machine.

    ``fs_hz`` is the expected sample rate (Hz); ``unit`` the sensor's native unit.
    ``limits_mm_s`` optionally overrides the machine's zone boundaries for this point
    (A/B, B/C, C/D in mm/s RMS).
    """

    id: str
    direction: str = "horizontal"
    quantity: str = "acceleration"
    unit: str = "m/s^2"
    fs_hz: float | None = None
    limits_mm_s: tuple[float, float, float] | None = None


@dataclass(frozen=True)
class Machine:
    """A monitored machine.

    ``speed_range_rpm`` is the operating speed range (r/min); ``excitation_orders`` the
    orders of running speed that excite the structure (1, 2, blade count, ...);
    ``line_frequency_hz`` (motors) adds 2x line frequency as an excitation;
    ``limits_mm_s`` overrides the class's zone boundaries (A/B, B/C, C/D, mm/s RMS).
    ``settings`` keeps any further keys of the registry file (documented in docs).
    """

    id: str
    name: str = ""
    location: str = ""
    machine_class: str = "group2/rigid"
    speed_range_rpm: tuple[float, float] = (600.0, 3600.0)
    excitation_orders: tuple[float, ...] = (1.0, 2.0)
    line_frequency_hz: float | None = None
    points: tuple[Point, ...] = ()
    modes: tuple[Mode, ...] = ()
    limits_mm_s: tuple[float, float, float] | None = None
    settings: Mapping[str, Any] = field(default_factory=dict)

    @property
    def speed_range_hz(self) -> tuple[float, float]:
        """Operating speed range in Hz (revolutions per second)."""
        return (self.speed_range_rpm[0] / 60.0, self.speed_range_rpm[1] / 60.0)

    def point(self, point_id: str) -> Point:
        """Return the measurement point ``point_id``; KeyError if the machine has none."""
        for p in self.points:
            if p.id == point_id:
                return p
        raise KeyError(f"machine {self.id!r} has no measurement point {point_id!r}")


@dataclass(frozen=True)
class Registry:
    """All machines of a plant, by id."""

    machines: tuple[Machine, ...] = ()

    def machine(self, machine_id: str) -> Machine:
        for m in self.machines:
            if m.id == machine_id:
                return m
        raise KeyError(f"no machine {machine_id!r} in the registry")

    def by_id(self) -> dict[str, Machine]:
        return {m.id: m for m in self.machines}


# ----------------------------------------------------------------------------- parsing


def _where(machine_id: str | None, extra: str = "") -> str:
    base = f"machine {machine_id!r}" if machine_id else "a machine entry"
    return f"{base}{extra}"


def _positive_float(value: Any, where: str, key: str, *, allow_zero: bool = False) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise RegistryError(f"{where}: '{key}' must be a number, got {value!r}.")
    v = float(value)
    if not math.isfinite(v) or v < 0 or (v == 0 and not allow_zero):
        raise RegistryError(f"{where}: '{key}' must be a positive finite number, got {value!r}.")
    return v


def _limits(value: Any, where: str, key: str) -> tuple[float, float, float] | None:
    if value is None:
        return None
    if not isinstance(value, list | tuple) or len(value) != 3:
        raise RegistryError(
            f"{where}: '{key}' must be three numbers [A/B, B/C, C/D] in mm/s RMS, got {value!r}."
        )
    a, b, c = (_positive_float(v, where, key) for v in value)
    if not a < b < c:
        raise RegistryError(
            f"{where}: '{key}' zone boundaries must increase (A/B < B/C < C/D), got {value!r}."
        )
    return (a, b, c)


def parse_mode(raw: Mapping[str, Any], machine_id: str | None = None) -> Mode:
    """Validate one mode table and return a :class:`Mode`."""
    name = str(raw.get("name", "")).strip()
    where = _where(machine_id, f", mode {name!r}" if name else ", a mode")
    if not name:
        raise RegistryError(f"{where}: 'name' is required.")
    if "frequency_hz" not in raw:
        raise RegistryError(f"{where}: 'frequency_hz' is required.")
    freq = _positive_float(raw["frequency_hz"], where, "frequency_hz")
    zeta = raw.get("damping_ratio")
    af = raw.get("amplification_factor")
    if zeta is not None:
        zeta = _positive_float(zeta, where, "damping_ratio")
        if not 0.0 < zeta < 1.0:
            raise RegistryError(f"{where}: 'damping_ratio' must lie in (0, 1), got {zeta!r}.")
    if af is not None:
        af = _positive_float(af, where, "amplification_factor")
        if af < 1.0:
            raise RegistryError(f"{where}: 'amplification_factor' must be >= 1, got {af!r}.")
    margin = raw.get("required_margin_pct")
    if margin is not None:
        margin = _positive_float(margin, where, "required_margin_pct", allow_zero=True)
        if margin >= 100:
            raise RegistryError(
                f"{where}: 'required_margin_pct' must be below 100 %, got {margin!r}."
            )
    date = raw.get("date")
    if isinstance(date, str):
        try:
            date = _dt.date.fromisoformat(date)
        except ValueError as exc:
            raise RegistryError(f"{where}: 'date' must be YYYY-MM-DD, got {date!r}.") from exc
    elif isinstance(date, _dt.datetime):
        date = date.date()
    elif date is not None and not isinstance(date, _dt.date):
        raise RegistryError(f"{where}: 'date' must be a date, got {date!r}.")
    return Mode(
        name=name,
        frequency_hz=freq,
        damping_ratio=zeta,
        amplification_factor=af,
        required_margin_pct=margin,
        source=str(raw.get("source", "")),
        date=date,
    )


def parse_point(raw: Mapping[str, Any], machine_id: str | None = None) -> Point:
    """Validate one measurement-point table and return a :class:`Point`."""
    pid = raw.get("id")
    where = _where(machine_id, f", point {pid!r}" if pid else ", a point")
    if not isinstance(pid, str) or not _ID_PATTERN.match(pid):
        raise RegistryError(
            f"{where}: 'id' must be 1-64 letters, digits, '-' or '_', got {pid!r}."
        )
    direction = raw.get("direction", "horizontal")
    if direction not in DIRECTIONS:
        raise RegistryError(f"{where}: 'direction' must be one of {DIRECTIONS}, got {direction!r}.")
    quantity = raw.get("quantity", "acceleration")
    if quantity not in QUANTITIES:
        raise RegistryError(f"{where}: 'quantity' must be one of {QUANTITIES}, got {quantity!r}.")
    unit = raw.get("unit", UNITS_BY_QUANTITY[quantity][0])
    if unit not in UNITS_BY_QUANTITY[quantity]:
        raise RegistryError(
            f"{where}: 'unit' for {quantity} must be one of {UNITS_BY_QUANTITY[quantity]}, got {unit!r}."
        )
    fs = raw.get("fs_hz")
    if fs is not None:
        fs = _positive_float(fs, where, "fs_hz")
    return Point(
        id=pid,
        direction=direction,
        quantity=quantity,
        unit=unit,
        fs_hz=fs,
        limits_mm_s=_limits(raw.get("limits_mm_s"), where, "limits_mm_s"),
    )


_MACHINE_KEYS = {
    "id", "name", "location", "class", "speed_range_rpm", "excitation_orders",
    "line_frequency_hz", "points", "modes", "limits_mm_s",
}


def parse_machine(raw: Mapping[str, Any]) -> Machine:
    """Validate one machine table and return a :class:`Machine`."""
    mid = raw.get("id")
    if not isinstance(mid, str) or not _ID_PATTERN.match(mid):
        raise RegistryError(
            f"a machine entry: 'id' must be 1-64 letters, digits, '-' or '_', got {mid!r}."
        )
    where = _where(mid)
    cls = raw.get("class", "group2/rigid")
    if cls not in MACHINE_CLASSES:
        raise RegistryError(f"{where}: 'class' must be one of {MACHINE_CLASSES}, got {cls!r}.")
    sr = raw.get("speed_range_rpm", [600, 3600])
    if not isinstance(sr, list | tuple) or len(sr) != 2:
        raise RegistryError(f"{where}: 'speed_range_rpm' must be [min, max] in r/min, got {sr!r}.")
    lo = _positive_float(sr[0], where, "speed_range_rpm")
    hi = _positive_float(sr[1], where, "speed_range_rpm")
    if not lo < hi:
        raise RegistryError(f"{where}: 'speed_range_rpm' minimum must be below maximum, got {sr!r}.")
    orders = raw.get("excitation_orders", [1, 2])
    if not isinstance(orders, list | tuple) or not orders:
        raise RegistryError(
            f"{where}: 'excitation_orders' must be a non-empty list of positive numbers, got {orders!r}."
        )
    orders_t = tuple(_positive_float(o, where, "excitation_orders") for o in orders)
    line = raw.get("line_frequency_hz")
    if line is not None:
        line = _positive_float(line, where, "line_frequency_hz")
    points_raw = raw.get("points", [])
    modes_raw = raw.get("modes", [])
    if not isinstance(points_raw, list) or not isinstance(modes_raw, list):
        raise RegistryError(f"{where}: 'points' and 'modes' must be arrays of tables.")
    points = tuple(parse_point(p, mid) for p in points_raw)
    ids = [p.id for p in points]
    if len(set(ids)) != len(ids):
        raise RegistryError(f"{where}: point ids must be unique, got {ids!r}.")
    modes = tuple(parse_mode(m, mid) for m in modes_raw)
    settings = {k: v for k, v in raw.items() if k not in _MACHINE_KEYS}
    return Machine(
        id=mid,
        name=str(raw.get("name", mid)),
        location=str(raw.get("location", "")),
        machine_class=cls,
        speed_range_rpm=(lo, hi),
        excitation_orders=orders_t,
        line_frequency_hz=line,
        points=points,
        modes=modes,
        limits_mm_s=_limits(raw.get("limits_mm_s"), where, "limits_mm_s"),
        settings=settings,
    )


def parse_registry(data: Mapping[str, Any]) -> Registry:
    """Validate a registry document (the parsed TOML) and return a :class:`Registry`."""
    raw = data.get("machines")
    if not isinstance(raw, list):
        raise RegistryError("the registry must have a [[machines]] array of tables.")
    machines = tuple(parse_machine(m) for m in raw)
    ids = [m.id for m in machines]
    dup = sorted({i for i in ids if ids.count(i) > 1})
    if dup:
        raise RegistryError(f"machine ids must be unique; repeated: {', '.join(dup)}.")
    return Registry(machines=machines)


def load_registry(path: str | Path) -> Registry:
    """Read a registry TOML file; errors name the file."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except OSError as exc:
        raise RegistryError(f"cannot read machine registry {str(p)!r}: {exc.strerror}.") from exc
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise RegistryError(f"machine registry {str(p)!r} is not valid TOML: {exc}.") from exc
    try:
        return parse_registry(data)
    except RegistryError as exc:
        raise RegistryError(f"{p}: {exc}") from exc


# ----------------------------------------------------------------------------- writing


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int | float):
        if isinstance(v, float) and v.is_integer() and abs(v) < 1e15:
            return str(int(v))
        return repr(v)
    if isinstance(v, _dt.date):
        return v.isoformat()
    if isinstance(v, list | tuple):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    s = str(v).replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n")
    return f'"{s}"'


def _lines(table: Iterable[tuple[str, Any]], indent: str) -> list[str]:
    return [f"{indent}{k} = {_toml_value(v)}" for k, v in table if v is not None]


def dump_registry(registry: Registry) -> str:
    """Return the registry as TOML text in the layout of DESIGN.md section 3.

    ``parse_registry(tomllib.loads(dump_registry(r))) == r`` holds for any valid ``r``.
    """
    out: list[str] = ["# whirlwatch machine registry", ""]
    for m in registry.machines:
        out.append("[[machines]]")
        out += _lines(
            [
                ("id", m.id),
                ("name", m.name),
                ("location", m.location),
                ("class", m.machine_class),
                ("speed_range_rpm", list(m.speed_range_rpm)),
                ("excitation_orders", list(m.excitation_orders)),
                ("line_frequency_hz", m.line_frequency_hz),
                ("limits_mm_s", list(m.limits_mm_s) if m.limits_mm_s else None),
                *sorted(m.settings.items()),
            ],
            "",
        )
        for p in m.points:
            out += ["", "  [[machines.points]]"]
            out += _lines(
                [
                    ("id", p.id),
                    ("direction", p.direction),
                    ("quantity", p.quantity),
                    ("unit", p.unit),
                    ("fs_hz", p.fs_hz),
                    ("limits_mm_s", list(p.limits_mm_s) if p.limits_mm_s else None),
                ],
                "  ",
            )
        for mode in m.modes:
            out += ["", "  [[machines.modes]]"]
            out += _lines(
                [
                    ("name", mode.name),
                    ("frequency_hz", mode.frequency_hz),
                    ("damping_ratio", mode.damping_ratio),
                    ("amplification_factor", mode.amplification_factor),
                    ("required_margin_pct", mode.required_margin_pct),
                    ("source", mode.source),
                    ("date", mode.date),
                ],
                "  ",
            )
        out.append("")
    return "\n".join(out) + "\n"
