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
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

from monitor.detection.zones import check_limits

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


# ----------------------------------------------------------------------------- bounds

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


def _where(machine_id: str | None, extra: str = "") -> str:
    base = f"machine {machine_id!r}" if machine_id else "a machine entry"
    return f"{base}{extra}"


def _number(value: Any, where: str, key: str) -> float:
    """``value`` as a finite float; RegistryError naming ``key`` otherwise."""
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise RegistryError(f"{where}: '{key}' must be a number, got {value!r}.")
    v = float(value)
    if not math.isfinite(v):
        raise RegistryError(f"{where}: '{key}' must be a finite number, got {value!r}.")
    return v


def _within(value: Any, where: str, key: str, lo: float, hi: float, *, lo_open: bool = False,
            hi_open: bool = False, unit: str = "") -> float:
    """``value`` as a float inside [lo, hi] (an end excluded when ``*_open``); else a
    RegistryError naming ``key`` and the range."""
    v = _number(value, where, key)
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


def _limits(value: Any, where: str, key: str) -> tuple[float, float, float] | None:
    if value is None:
        return None
    if not isinstance(value, list | tuple) or len(value) != 3:
        raise RegistryError(
            f"{where}: '{key}' must be three numbers [A/B, B/C, C/D] in mm/s RMS, got {value!r}."
        )
    numbers = [_number(v, where, key) for v in value]
    try:
        return check_limits(numbers, f"'{key}'")
    except ValueError as exc:
        raise RegistryError(f"{where}: {exc}") from exc


def check_mode(mode: Mode, machine_id: str | None = None) -> Mode:
    """The physical bounds of a mode (docs/registry.md); returns it, or RegistryError
    naming the machine, the mode and the key. Every door calls this, through
    :func:`parse_mode` or directly."""
    name = mode.name
    where = _where(machine_id, f", mode {name!r}" if name else ", a mode")
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
    where = _where(machine_id, f", point {pid!r}" if pid else ", a point")
    if not isinstance(pid, str) or not _ID_PATTERN.match(pid):
        raise RegistryError(
            f"{where}: 'id' must be 1-64 letters, digits, '-' or '_', got {pid!r}."
        )
    if point.direction not in DIRECTIONS:
        raise RegistryError(
            f"{where}: 'direction' must be one of {DIRECTIONS}, got {point.direction!r}.")
    if point.quantity not in QUANTITIES:
        raise RegistryError(
            f"{where}: 'quantity' must be one of {QUANTITIES}, got {point.quantity!r}.")
    units = UNITS_BY_QUANTITY[point.quantity]
    if point.unit not in units:
        raise RegistryError(
            f"{where}: 'unit' for {point.quantity} must be one of {units}, got {point.unit!r}.")
    if point.fs_hz is not None:
        _positive(point.fs_hz, where, "fs_hz", unit=" Hz")
    _limits(point.limits_mm_s, where, "limits_mm_s")
    return point


def check_machine(machine: Machine) -> Machine:
    """The bounds of a machine, its points, its modes and its settings (detection
    settings, bearing geometry); returns it, or RegistryError naming the machine, the
    entry and the key."""
    mid = machine.id
    if not isinstance(mid, str) or not _ID_PATTERN.match(mid):
        raise RegistryError(
            f"a machine entry: 'id' must be 1-64 letters, digits, '-' or '_', got {mid!r}."
        )
    where = _where(mid)
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
    _limits(machine.limits_mm_s, where, "limits_mm_s")
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
    return machine


def _check_settings(settings: Mapping[str, Any], where: str) -> None:
    # Imported here: both modules build on this one.
    from monitor.analysis.bearings import BearingGeometry
    from monitor.detection.evaluator import DetectionSettings

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


# ----------------------------------------------------------------------------- strictness

#: Keys of a mode table and of a point table: nothing else is accepted there.
MODE_KEYS = ("name", "frequency_hz", "damping_ratio", "amplification_factor",
             "required_margin_pct", "source", "date")
POINT_KEYS = ("id", "direction", "quantity", "unit", "fs_hz", "limits_mm_s")
_MACHINE_KEYS = {
    "id", "name", "location", "class", "speed_range_rpm", "excitation_orders",
    "line_frequency_hz", "points", "modes", "limits_mm_s",
}
_UNIT_SUFFIX = re.compile(r"_(hz|rpm|mm_s|pct|mm|deg|s)$")


def machine_setting_keys() -> frozenset[str]:
    """The further keys of a machine table whirlwatch reads: detection settings
    (docs/alarms.md) and the bearing geometry (docs/registry.md)."""
    from monitor.analysis.bearings import SETTINGS_KEYS
    from monitor.detection.evaluator import DetectionSettings

    return frozenset({f.name for f in fields(DetectionSettings)} | set(SETTINGS_KEYS))


def edit_distance(a: str, b: str) -> int:
    """Edits (insert, delete, substitute, swap two neighbours) turning ``a`` into ``b``
    (the optimal string alignment distance)."""
    prev2: list[int] = []
    prev = list(range(len(b) + 1))
    for i, ca in enumerate(a, 1):
        cur = [i] + [0] * len(b)
        for j, cb in enumerate(b, 1):
            cur[j] = min(prev[j] + 1, cur[j - 1] + 1, prev[j - 1] + (ca != cb))
            if i > 1 and j > 1 and ca == b[j - 2] and a[i - 2] == cb:
                cur[j] = min(cur[j], prev2[j - 2] + 1)
        prev2, prev = prev, cur
    return prev[-1]


def misspelling_of(key: str, known: Iterable[str]) -> str | None:
    """The known key ``key`` looks like a misspelling of, or None: the same but for case,
    '-' or a space; one edit away (two for keys longer than six letters); or one of those
    from the known key without its unit suffix (``speed_range`` for ``speed_range_rpm``)."""
    k = key.strip().lower().replace("-", "_").replace(" ", "_")
    best: tuple[int, str] | None = None
    for name in known:
        if k == name:
            return name if key != name else None
        allowed = 1 if len(name) <= 6 else 2
        stem = _UNIT_SUFFIX.sub("", name)
        d = min(edit_distance(k, name), edit_distance(k, stem) if stem != name else 99)
        if d <= allowed and (best is None or d < best[0]):
            best = (d, name)
    return None if best is None else best[1]


def _is_table(value: Any) -> bool:
    return isinstance(value, Mapping) or (
        isinstance(value, list) and bool(value) and all(isinstance(v, Mapping) for v in value))


def _refuse_unknown(raw: Mapping[str, Any], known: Iterable[str], where: str, what: str) -> None:
    """RegistryError for the first key of a mode or point table that is not ``known``."""
    known = tuple(known)
    for key in raw:
        if key in known:
            continue
        near = misspelling_of(key, known)
        hint = f" (did you mean {near!r}?)" if near else ""
        raise RegistryError(
            f"{where}: unknown key {key!r}{hint}; a {what} has only {', '.join(known)}.")


def _refuse_misspellings(raw: Mapping[str, Any], where: str) -> None:
    """RegistryError for a machine-table key that looks like a misspelt known key or
    table; other unknown keys are kept (see :func:`registry_warnings`)."""
    known = _MACHINE_KEYS | machine_setting_keys()
    for key, value in raw.items():
        if key in known:
            continue
        near = misspelling_of(key, sorted(known))
        if near is not None:
            kind = "table" if _is_table(value) else "key"
            raise RegistryError(
                f"{where}: unknown {kind} {key!r} (did you mean {near!r}?); "
                f"fix its spelling, or whirlwatch would not read it.")


def registry_warnings(registry: Registry) -> list[str]:
    """One sentence per machine naming the keys of its table whirlwatch does not read:
    they are kept in the database and exported unchanged, but nothing acts on them."""
    known = machine_setting_keys()
    out = []
    for m in registry.machines:
        extra = [k for k in m.settings if k not in known]
        if extra:
            names = ", ".join(repr(k) for k in extra)
            out.append(f"machine {m.id!r}: {names} {'is' if len(extra) == 1 else 'are'} not read "
                       f"by whirlwatch; kept and exported unchanged.")
    return out


# ----------------------------------------------------------------------------- parsing


def parse_mode(raw: Mapping[str, Any], machine_id: str | None = None) -> Mode:
    """Validate one mode table (strict: only :data:`MODE_KEYS`) and return a :class:`Mode`."""
    if not isinstance(raw, Mapping):
        raise RegistryError(f"{_where(machine_id)}: each mode must be a table, got {raw!r}.")
    name = str(raw.get("name", "")).strip()
    where = _where(machine_id, f", mode {name!r}" if name else ", a mode")
    _refuse_unknown(raw, MODE_KEYS, where, "mode")
    if not name:
        raise RegistryError(f"{where}: 'name' is required.")
    if "frequency_hz" not in raw:
        raise RegistryError(f"{where}: 'frequency_hz' is required.")
    optional = {k: None if raw.get(k) is None else _number(raw[k], where, k)
                for k in ("damping_ratio", "amplification_factor", "required_margin_pct")}
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
    return check_mode(Mode(
        name=name,
        frequency_hz=_number(raw["frequency_hz"], where, "frequency_hz"),
        source=str(raw.get("source", "")),
        date=date,
        **optional,
    ), machine_id)


def parse_point(raw: Mapping[str, Any], machine_id: str | None = None) -> Point:
    """Validate one measurement-point table (strict: only :data:`POINT_KEYS`) and return
    a :class:`Point`."""
    if not isinstance(raw, Mapping):
        raise RegistryError(f"{_where(machine_id)}: each point must be a table, got {raw!r}.")
    pid = raw.get("id")
    where = _where(machine_id, f", point {pid!r}" if pid else ", a point")
    _refuse_unknown(raw, POINT_KEYS, where, "point")
    quantity = raw.get("quantity", "acceleration")
    fs = raw.get("fs_hz")
    return check_point(Point(
        id=pid,  # type: ignore[arg-type]  # checked by check_point
        direction=raw.get("direction", "horizontal"),
        quantity=quantity,
        unit=raw.get("unit", UNITS_BY_QUANTITY[quantity][0] if quantity in QUANTITIES else ""),
        fs_hz=None if fs is None else _number(fs, where, "fs_hz"),
        limits_mm_s=_limits(raw.get("limits_mm_s"), where, "limits_mm_s"),
    ), machine_id)


def parse_machine(raw: Mapping[str, Any]) -> Machine:
    """Validate one machine table and return a :class:`Machine`. A key that looks like a
    misspelt known key or table is an error; other unknown keys go to ``settings``."""
    if not isinstance(raw, Mapping):
        raise RegistryError(f"each [[machines]] entry must be a table, got {raw!r}.")
    mid = raw.get("id")
    if not isinstance(mid, str) or not _ID_PATTERN.match(mid):
        raise RegistryError(
            f"a machine entry: 'id' must be 1-64 letters, digits, '-' or '_', got {mid!r}."
        )
    where = _where(mid)
    _refuse_misspellings(raw, where)
    sr = raw.get("speed_range_rpm", [600, 3600])
    if not isinstance(sr, list | tuple) or len(sr) != 2:
        raise RegistryError(f"{where}: 'speed_range_rpm' must be [min, max] in r/min, got {sr!r}.")
    orders = raw.get("excitation_orders", [1, 2])
    if not isinstance(orders, list | tuple) or not orders:
        raise RegistryError(
            f"{where}: 'excitation_orders' must be a non-empty list of positive numbers, got {orders!r}."
        )
    line = raw.get("line_frequency_hz")
    points_raw = raw.get("points", [])
    modes_raw = raw.get("modes", [])
    if not isinstance(points_raw, list) or not isinstance(modes_raw, list):
        raise RegistryError(f"{where}: 'points' and 'modes' must be arrays of tables.")
    return check_machine(Machine(
        id=mid,
        name=str(raw.get("name", mid)),
        location=str(raw.get("location", "")),
        machine_class=raw.get("class", "group2/rigid"),
        speed_range_rpm=(_number(sr[0], where, "speed_range_rpm"),
                         _number(sr[1], where, "speed_range_rpm")),
        excitation_orders=tuple(_number(o, where, "excitation_orders") for o in orders),
        line_frequency_hz=None if line is None else _number(line, where, "line_frequency_hz"),
        points=tuple(parse_point(p, mid) for p in points_raw),
        modes=tuple(parse_mode(m, mid) for m in modes_raw),
        limits_mm_s=_limits(raw.get("limits_mm_s"), where, "limits_mm_s"),
        settings={k: v for k, v in raw.items() if k not in _MACHINE_KEYS},
    ))


def parse_registry(data: Mapping[str, Any]) -> Registry:
    """Validate a registry document (the parsed TOML) and return a :class:`Registry`.
    The document holds ``[[machines]]`` only: any other top-level key is an error."""
    for key, value in data.items():
        if key != "machines":
            near = misspelling_of(key, ["machines"])
            kind = "table" if _is_table(value) else "key"
            hint = " (did you mean 'machines'?)" if near else ""
            raise RegistryError(
                f"unknown top-level {kind} {key!r}{hint}; the registry holds [[machines]] tables only.")
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


_BARE_KEY = re.compile(r"^[A-Za-z0-9_-]+$")


def _toml_key(k: str) -> str:
    return k if _BARE_KEY.match(k) else _toml_string(k)


def _toml_string(v: str) -> str:
    s = v.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n")
    return f'"{s}"'


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int | float):
        if isinstance(v, float) and v.is_integer() and abs(v) < 1e15:
            return str(int(v))
        return repr(v)
    if isinstance(v, _dt.date):
        return v.isoformat()
    if isinstance(v, Mapping):
        # Kept settings of any TOML shape go back as inline tables.
        return "{" + ", ".join(f"{_toml_key(str(k))} = {_toml_value(x)}" for k, x in v.items()) + "}"
    if isinstance(v, list | tuple):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    return _toml_string(str(v))


def _lines(table: Iterable[tuple[str, Any]], indent: str) -> list[str]:
    return [f"{indent}{_toml_key(k)} = {_toml_value(v)}" for k, v in table if v is not None]


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
