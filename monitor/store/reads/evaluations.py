"""What the dashboard shows of the detector's stored evaluation of a reading, the margin
table at a machine's current speed and the zone limits of its points.

The service stores each reading's evaluation as ``ReadingEvaluation.to_json``
(monitor/detection/evaluator.py; the margin table only with the newest reading of each
machine in a batch): zone limits as ``zone_limits_mm_s`` and ``zone_limits_source``, the
growth features as a list of objects with a ``name``, the margin rows as
``MarginRow.to_json`` objects.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable, Sequence
from typing import Any, TypedDict

from monitor.detection.margins import margin_table, required_margin
from monitor.detection.zones import ZoneLimits, zone_limits
from monitor.model import registry as reg
from monitor.model.bounds import check_machine
from monitor.store.models import Machine, MeasurementPoint
from monitor.store.registry_sync import mode_from_row, usable_modes


class EvaluationView(TypedDict):
    """The parts of a stored evaluation the dashboard shows; ``features`` by name."""

    zone_limits_mm_s: list[float] | None
    zone_limits_source: str | None
    features: dict[str, dict[str, Any]]
    margins: list[dict[str, Any]]
    growth_ignored: str | None


def evaluation_view(ev: Any) -> EvaluationView:
    """The parts of a stored evaluation (the service's JSON, or None) the dashboard shows;
    a part missing or malformed reads as absent."""
    ev = ev if isinstance(ev, dict) else {}
    lim, src = ev.get("zone_limits_mm_s"), ev.get("zone_limits_source")
    if not (isinstance(lim, list) and len(lim) == 3 and all(isinstance(v, int | float) for v in lim)):
        lim, src = None, None
    features = {f["name"]: f for f in ev.get("features") or () if isinstance(f, dict) and "name" in f}
    margins = [r for r in ev.get("margins") or () if isinstance(r, dict) and "margin_pct" in r]
    return {"zone_limits_mm_s": lim, "zone_limits_source": src, "features": features, "margins": margins,
            "growth_ignored": ev.get("growth_ignored")}


def feature_json(f: dict[str, Any]) -> dict[str, Any]:
    """One growth feature of a stored evaluation: value and learned baseline (median and
    MAD, in ``unit``), ratio to it, Theil-Sen trend per day and projected time to limit."""
    ttl = f.get("time_to_limit_s")
    return {"name": f.get("name"), "unit": f.get("unit"), "value": f.get("value"),
            "baseline_median": f.get("baseline_median"), "baseline_mad": f.get("baseline_mad"),
            "baseline_status": f.get("baseline_status"), "ratio": f.get("ratio"),
            "trend_per_day": f.get("trend_per_day"), "limit_name": f.get("limit_name"),
            "limit_value": f.get("limit_value"),
            "time_to_limit_days": None if ttl is None else ttl / 86400.0}


def _to_registry(m: Any, modes: Iterable[Any]) -> reg.Machine | None:
    # ``m`` and ``modes``: ORM objects or column rows with the same attribute names; the
    # modes within the registry's bounds (usable_modes). None when the machine's own
    # stored values are outside them (an older release let them in).
    try:
        return check_machine(reg.Machine(
            id=m.id, name=m.name, location=m.location, machine_class=m.machine_class,
            speed_range_rpm=(m.speed_min_rpm, m.speed_max_rpm),
            excitation_orders=tuple(float(o) for o in (m.excitation_orders or ())),
            line_frequency_hz=m.line_frequency_hz,
            modes=tuple(mode_from_row(x) for x in modes),
            limits_mm_s=tuple(m.limits_mm_s) if m.limits_mm_s else None,
            settings=m.settings or {},
        ))
    except (reg.RegistryError, TypeError):
        return None


#: Margin tables computed here (when no stored evaluation fits), keyed by everything they
#: depend on: machine orders and line frequency, the mode set and the running speed.
_MARGIN_CACHE: dict[tuple[Any, ...], list[dict[str, Any]]] = {}
_MARGIN_CACHE_MAX = 4096


def margins_for(m: Any, modes: Sequence[Any], speed_hz: float | None) -> list[dict[str, Any]]:
    """Margin table (``MarginRow.to_json`` rows) at ``speed_hz``, computed by
    monitor.detection.margins; cached per machine set-up, mode set and speed."""
    if speed_hz is None or not modes:
        return []
    default = (m.settings or {}).get("required_margin_pct")
    key = (m.id, tuple(m.excitation_orders or ()), m.line_frequency_hz, default, float(speed_hz),
           tuple((x.name, x.frequency_hz, x.damping_ratio, x.amplification_factor, x.required_margin_pct)
                 for x in modes))
    rows = _MARGIN_CACHE.get(key)
    if rows is None:
        machine = _to_registry(m, modes)
        rows = [] if machine is None else [
            r.to_json() for r in margin_table(machine, speed_hz, machine_default_pct=default)]
        if len(_MARGIN_CACHE) >= _MARGIN_CACHE_MAX:
            _MARGIN_CACHE.clear()
        _MARGIN_CACHE[key] = rows
    return rows


def mode_bands(m: Any, modes: Sequence[Any]) -> list[dict[str, Any]]:
    """Each usable mode's required band as the margin table judges it, for the charts:
    ``mode``, ``mode_hz``, ``below_pct`` and ``above_pct`` (the required margins, percent of
    the mode frequency, with the mode below and above the excitation), ``low_hz`` and
    ``high_hz`` (the band's edges, Hz: an excitation between them is closer than required)
    and ``basis``. The rule is monitor.detection.margins (``required_margin`` and
    ``RequiredMargin.band``, the margins of every table row), with the machine default the
    table here takes (:func:`margins_for`); an excitation the table calls clear lies
    outside its mode's band."""
    modes = usable_modes(modes, m.id)
    machine = _to_registry(m, modes) if modes else None
    if machine is None:
        return []
    default = (m.settings or {}).get("required_margin_pct")
    out = []
    for mo in machine.modes:
        req = required_margin(mo, default)
        low, high = req.band(mo.frequency_hz)
        out.append({"mode": mo.name, "mode_hz": mo.frequency_hz, "below_pct": req.below_pct,
                    "above_pct": req.above_pct, "low_hz": low, "high_hz": high, "basis": req.basis})
    return out


def current_margins(m: Any, modes: Sequence[Any], speed_hz: float | None,
                    evaluation: Any, evaluated_at: dt.datetime | None) -> list[dict[str, Any]]:
    """The margin table at the newest reading's speed: the rows the service stored in
    that reading's evaluation when they were computed with the current mode set (same
    names and frequencies, no mode or machine edited since), else computed here. Stored
    modes outside the registry's bounds take no part (the service leaves them out too)."""
    modes = usable_modes(modes, m.id)
    stored = evaluation_view(evaluation)["margins"]
    if speed_hz is not None and stored and modes and evaluated_at is not None:
        edited = max([x.updated_at for x in modes if x.updated_at] + ([m.updated_at] if m.updated_at else []),
                     default=None)
        same_modes = {(r.get("mode"), r.get("mode_hz")) for r in stored} == {(x.name, x.frequency_hz) for x in modes}
        if same_modes and (edited is None or edited <= evaluated_at):
            return stored
    return margins_for(m, modes, speed_hz)


def nearest_margin(margins: Sequence[dict[str, Any]]) -> dict[str, Any] | None:
    """The margin row closest to (or furthest inside) its required margin, for the
    overview; None without rows."""
    rows = [r for r in margins if r["required_pct"] > 0] or list(margins)
    if not rows:
        return None
    r = min(rows, key=lambda r: r["margin_pct"] - r["required_pct"])
    order = r["excitation"].rstrip("x") if r["order"] is not None else r["excitation"]
    return {"mode": r["mode"], "mode_hz": r["mode_hz"], "order": order,
            "excitation": r["excitation"], "excitation_hz": r["excitation_hz"],
            "margin_pct": r["margin_pct"], "required_pct": r["required_pct"],
            "within_required": r["status"] == "inside", "status": r["status"]}


def point_zone_limits(m: Machine, p: MeasurementPoint) -> ZoneLimits | None:
    """The ISO 20816 zone boundaries of a point (its own, its machine's or its class's),
    or None when the stored values give none."""
    try:
        return zone_limits(m.machine_class, m.limits_mm_s, p.limits_mm_s)
    except ValueError:
        return None
