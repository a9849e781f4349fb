"""The machine registry file: TOML read strictly, and written back.

:func:`load_registry` and :func:`parse_registry` read the layout of docs/registry.md: a
mode or point table holds only its known keys; a machine table's key that looks like a
misspelt known key is an error (``did you mean ...?``); other machine keys are kept as
``settings`` and named by :func:`registry_warnings`. Every entry is then checked against
:mod:`monitor.model.bounds`. :func:`dump_registry` writes the same layout back, so
``parse_registry(tomllib.loads(dump_registry(r))) == r``.
"""

from __future__ import annotations

import datetime as _dt
import re
import tomllib
from collections.abc import Iterable, Mapping
from dataclasses import fields
from pathlib import Path
from typing import Any

from monitor.model.bearing_geometry import SETTINGS_KEYS
from monitor.model.bounds import (
    check_machine,
    check_machine_id,
    check_mode,
    check_point,
    entry_label,
    limits_mm_s,
    number,
    quoted,
)
from monitor.model.detection_settings import DetectionSettings
from monitor.model.registry import Machine, Mode, Point, Registry, RegistryError
from monitor.model.units import BASE_UNIT, QUANTITIES

# ----------------------------------------------------------------------------- strictness

#: Keys of a mode table and of a point table: nothing else is accepted there.
MODE_KEYS = ("name", "frequency_hz", "damping_ratio", "amplification_factor",
             "required_margin_pct", "source", "date")
POINT_KEYS = ("id", "direction", "quantity", "unit", "fs_hz", "limits_mm_s")
#: Keys of a machine table read as its fields; any other key is kept as a setting.
MACHINE_KEYS = {
    "id", "name", "location", "class", "speed_range_rpm", "excitation_orders",
    "line_frequency_hz", "points", "modes", "limits_mm_s",
}
_UNIT_SUFFIX = re.compile(r"_(hz|rpm|mm_s|pct|mm|deg|s)$")


def machine_setting_keys() -> frozenset[str]:
    """The further keys of a machine table whirlwatch reads: detection settings
    (docs/alarms.md) and the bearing geometry (docs/registry.md)."""
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
    known = MACHINE_KEYS | machine_setting_keys()
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
        raise RegistryError(f"{entry_label(machine_id)}: each mode must be a table, got {raw!r}.")
    given = raw.get("name", "")
    name = given.strip() if isinstance(given, str) else ""
    where = entry_label(machine_id, f", mode {name!r}" if name else ", a mode")
    _refuse_unknown(raw, MODE_KEYS, where, "mode")
    for key in ("name", "source"):
        if key in raw and not isinstance(raw[key], str):
            raise RegistryError(f"{where}: '{key}' must be a string, got {quoted(raw[key])}.")
    if not name:
        raise RegistryError(f"{where}: 'name' is required.")
    if "frequency_hz" not in raw:
        raise RegistryError(f"{where}: 'frequency_hz' is required.")
    optional = {k: None if raw.get(k) is None else number(raw[k], where, k)
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
        frequency_hz=number(raw["frequency_hz"], where, "frequency_hz"),
        source=raw.get("source", ""),
        date=date,
        **optional,
    ), machine_id)


def parse_point(raw: Mapping[str, Any], machine_id: str | None = None) -> Point:
    """Validate one measurement-point table (strict: only :data:`POINT_KEYS`) and return
    a :class:`Point`."""
    if not isinstance(raw, Mapping):
        raise RegistryError(f"{entry_label(machine_id)}: each point must be a table, got {raw!r}.")
    pid = raw.get("id")
    where = entry_label(machine_id, f", point {pid!r}" if pid else ", a point")
    _refuse_unknown(raw, POINT_KEYS, where, "point")
    quantity = raw.get("quantity", "acceleration")
    fs = raw.get("fs_hz")
    return check_point(Point(
        id=pid,  # type: ignore[arg-type]  # checked by check_point
        direction=raw.get("direction", "horizontal"),
        quantity=quantity,
        unit=raw.get("unit", BASE_UNIT[quantity] if quantity in QUANTITIES else ""),
        fs_hz=None if fs is None else number(fs, where, "fs_hz"),
        limits_mm_s=limits_mm_s(raw.get("limits_mm_s"), where, "limits_mm_s"),
    ), machine_id)


def parse_machine(raw: Mapping[str, Any]) -> Machine:
    """Validate one machine table and return a :class:`Machine`. A key that looks like a
    misspelt known key or table is an error; other unknown keys go to ``settings``."""
    if not isinstance(raw, Mapping):
        raise RegistryError(f"each [[machines]] entry must be a table, got {raw!r}.")
    mid = check_machine_id(raw.get("id"))
    where = entry_label(mid)
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
        speed_range_rpm=(number(sr[0], where, "speed_range_rpm"),
                         number(sr[1], where, "speed_range_rpm")),
        excitation_orders=tuple(number(o, where, "excitation_orders") for o in orders),
        line_frequency_hz=None if line is None else number(line, where, "line_frequency_hz"),
        points=tuple(parse_point(p, mid) for p in points_raw),
        modes=tuple(parse_mode(m, mid) for m in modes_raw),
        limits_mm_s=limits_mm_s(raw.get("limits_mm_s"), where, "limits_mm_s"),
        settings={k: v for k, v in raw.items() if k not in MACHINE_KEYS},
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
    """Return the registry as TOML text in the layout of docs/registry.md.

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
