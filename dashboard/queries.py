"""Reads and writes the dashboard needs, on the store's models.

Every page-level read here issues a fixed number of SQL statements whatever the number
of machines or stored readings: rows for all machines are fetched in one statement per
table, the latest reading per point by an indexed correlated lookup, and trends are
decimated in numpy from the indexed (machine, point, ts) range before the heavy JSON
columns are fetched for the kept rows only.
"""

from __future__ import annotations

import datetime as dt
import math
from collections import defaultdict
from collections.abc import Iterable
from typing import Any

import numpy as np
from sqlalchemy import func, select
from sqlalchemy.orm import Session, aliased

from monitor.detection.alarms import severity_rank
from monitor.detection.margins import margin_table
from monitor.detection.zones import zone_limits
from monitor.model import registry as reg
from monitor.model.bounds import check_machine
from monitor.model.timefmt import iso_utc
from monitor.store.auth import create_api_token, verify_api_token
from monitor.store.models import (
    Alarm,
    ApiToken,
    BaselineRestart,
    Machine,
    Measurement,
    MeasurementPoint,
    Mode,
    ModeHistory,
    SpectrumSnapshot,
    User,
)
from monitor.store.queries import alarm_as_json
from monitor.store.registry_sync import (
    mode_from_row,
    mode_problem,
    recent_baseline_restarts,
    usable_modes,
)

OPEN_STATES = ("active", "acknowledged")
ZONE_ORDER = {"A": 1, "B": 2, "C": 3, "D": 4}
#: Spectra longer than this are thinned (peak per bucket) before they go to the browser.
MAX_SPECTRUM_BINS = 8192


# ----------------------------------------------------------------------------- people


def user_by_id(s: Session, uid: int) -> User | None:
    u = s.get(User, uid)
    return None if u is None or u.disabled else u


def user_for_token(s: Session, token: str) -> User | None:
    """The user an API token acts for (the store's check: sha256 digest, not revoked,
    user not disabled), or None. The store stamps the time of use; commit it."""
    user = verify_api_token(s, token)
    if user is not None:
        s.commit()
    return user


def create_token(s: Session, user: User, label: str) -> str:
    """Store a new token's hash (the store's ``create_api_token``); returns the token
    text, shown once."""
    text = create_api_token(s, user.name, label)
    s.commit()
    return text


def list_tokens(s: Session) -> list[dict]:
    rows = s.execute(select(ApiToken, User.name).join(User).order_by(ApiToken.id.desc())).all()
    return [
        {"id": t.id, "username": n, "label": t.label, "created_at": t.created_at,
         "last_used_at": t.last_used_at, "revoked_at": t.revoked_at}
        for t, n in rows
    ]


# ----------------------------------------------------------------------------- registry


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
_MARGIN_CACHE: dict[tuple, list[dict]] = {}
_MARGIN_CACHE_MAX = 4096


def margins_for(m: Any, modes: list[Any], speed_hz: float | None) -> list[dict]:
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


def current_margins(m: Any, modes: list[Any], speed_hz: float | None,
                    evaluation: dict | None, evaluated_at: dt.datetime | None) -> list[dict]:
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


def evaluation_view(ev: Any) -> dict:
    """The parts of a stored ``ReadingEvaluation`` the dashboard shows.

    The service stores the detector's evaluation either as ``to_json()`` (zone limits as
    ``zone_limits_mm_s`` + ``zone_limits_source``) or field by field (``zone_limits`` as
    ``{"ab", "bc", "cd", "source"}``); margins rows and features carry the same keys in both.
    """
    ev = ev if isinstance(ev, dict) else {}
    lim, src = ev.get("zone_limits_mm_s"), ev.get("zone_limits_source")
    z = ev.get("zone_limits")
    if lim is None and isinstance(z, dict):
        lim, src = [z.get("ab"), z.get("bc"), z.get("cd")], z.get("source")
    if not (isinstance(lim, list) and len(lim) == 3 and all(isinstance(v, (int, float)) for v in lim)):
        lim, src = None, None
    features = {f["name"]: f for f in ev.get("features") or () if isinstance(f, dict) and "name" in f}
    margins = [r for r in ev.get("margins") or () if isinstance(r, dict) and "margin_pct" in r]
    return {"zone_limits_mm_s": lim, "zone_limits_source": src, "features": features, "margins": margins,
            "growth_ignored": ev.get("growth_ignored")}


def feature_json(f: dict) -> dict:
    """One growth feature of a stored evaluation: value and learned baseline (median and
    MAD, in ``unit``), ratio to it, Theil-Sen trend per day and projected time to limit."""
    ttl = f.get("time_to_limit_s")
    return {"name": f.get("name"), "unit": f.get("unit"), "value": f.get("value"),
            "baseline_median": f.get("baseline_median"), "baseline_mad": f.get("baseline_mad"),
            "baseline_status": f.get("baseline_status"), "ratio": f.get("ratio"),
            "trend_per_day": f.get("trend_per_day"), "limit_name": f.get("limit_name"),
            "limit_value": f.get("limit_value"),
            "time_to_limit_days": None if ttl is None else ttl / 86400.0}


def _newest_id():
    # The newest measurement of a point: one indexed lookup through the
    # (machine_id, point_id, ts) unique index, correlated to measurement_points.
    inner = aliased(Measurement)
    return (
        select(inner.id)
        .where(inner.machine_id == MeasurementPoint.machine_id, inner.point_id == MeasurementPoint.id)
        .order_by(inner.ts.desc())
        .limit(1)
        .correlate(MeasurementPoint)
        .scalar_subquery()
    )


def _latest_per_point(s: Session, machine_ids: list[str]):
    """The newest measurement of every active point of ``machine_ids``, one statement."""
    return s.scalars(
        select(Measurement)
        .join(MeasurementPoint, Measurement.id == _newest_id())
        .where(MeasurementPoint.active.is_(True), MeasurementPoint.machine_id.in_(machine_ids))
    ).all()


def _latest_per_point_rows(s: Session):
    """The cheap columns of the newest measurement of every active point, one statement."""
    return s.execute(
        select(Measurement.id, Measurement.machine_id, Measurement.point_id, Measurement.ts,
               Measurement.speed_hz, Measurement.zone, Measurement.overall_velocity_mm_s_rms,
               Measurement.stored_at)
        .join(MeasurementPoint, Measurement.id == _newest_id())
        .where(MeasurementPoint.active.is_(True))
    ).all()


def _machine_state(n_open: int, latest: dt.datetime | None) -> str:
    if n_open:
        return "alarm"
    return "no_data" if latest is None else "normal"


def _nearest(margins: list[dict]) -> dict | None:
    # The row closest to (or furthest inside) its required margin.
    rows = [r for r in margins if r["required_pct"] > 0] or margins
    if not rows:
        return None
    r = min(rows, key=lambda r: r["margin_pct"] - r["required_pct"])
    return {"mode": r["mode"], "mode_hz": r["mode_hz"], "order": r["excitation"].rstrip("x") if r["order"] is not None else r["excitation"],
            "excitation": r["excitation"], "excitation_hz": r["excitation_hz"],
            "margin_pct": r["margin_pct"], "required_pct": r["required_pct"],
            "within_required": r["status"] == "inside", "status": r["status"]}


def machine_summaries(s: Session) -> list[dict]:
    """Every active machine with its current state, for the plant overview (6 statements).

    Plain column rows, not ORM objects (the page reads a few columns of thousands of rows);
    the nearest margin comes from the margin rows the service stored with each machine's
    newest reading (:func:`current_margins`), and only that part of its evaluation is read."""
    machines = s.execute(select(
        Machine.id, Machine.name, Machine.location, Machine.machine_class, Machine.speed_min_rpm,
        Machine.speed_max_rpm, Machine.excitation_orders, Machine.line_frequency_hz, Machine.limits_mm_s,
        Machine.settings, Machine.updated_at,
    ).where(Machine.active.is_(True)).order_by(Machine.position, Machine.id)).all()
    modes_by: dict[str, list] = defaultdict(list)
    for mo in s.execute(select(
            Mode.machine_id, Mode.name, Mode.frequency_hz, Mode.damping_ratio, Mode.amplification_factor,
            Mode.required_margin_pct, Mode.source, Mode.date, Mode.updated_at,
    ).join(Machine).where(Machine.active.is_(True)).order_by(Mode.position, Mode.id)):
        modes_by[mo.machine_id].append(mo)
    latest_by: dict[str, list] = defaultdict(list)
    for me in _latest_per_point_rows(s):
        latest_by[me.machine_id].append(me)
    newest_by = {mid: max(rows, key=lambda r: r.ts) for mid, rows in latest_by.items()}
    stored = dict(s.execute(
        select(Measurement.id, Measurement.evaluation["margins"])
        .where(Measurement.id.in_([r.id for r in newest_by.values()]))).all()) if newest_by else {}
    open_by: dict[str, dict[str, int]] = defaultdict(dict)
    for mid, sev, n in s.execute(
        select(Alarm.machine_id, Alarm.severity, func.count())
        .where(Alarm.state.in_(OPEN_STATES)).group_by(Alarm.machine_id, Alarm.severity)
    ):
        open_by[mid][sev] = n
    out = []
    for m in machines:
        rows = latest_by.get(m.id, [])
        newest = newest_by.get(m.id)
        speed = newest.speed_hz if newest else None
        margins = current_margins(m, modes_by.get(m.id, []), speed,
                                  {"margins": stored.get(newest.id)} if newest else None,
                                  newest.stored_at if newest else None)
        zoned = [r for r in rows if r.zone in ZONE_ORDER]
        worst = max(zoned, key=lambda r: (ZONE_ORDER[r.zone], r.overall_velocity_mm_s_rms or 0)) if zoned else None
        sev = open_by.get(m.id, {})
        n_open = sum(sev.values())
        out.append({
            "id": m.id, "name": m.name or m.id, "location": m.location,
            "class": m.machine_class,
            "state": _machine_state(n_open, newest.ts if newest else None),
            "speed_hz": speed, "speed_rpm": None if speed is None else speed * 60.0,
            "last_reading_at": iso_utc(newest.ts) if newest else None,
            "nearest_margin": _nearest(margins),
            "worst_zone": None if worst is None else {
                "point": worst.point_id, "zone": worst.zone,
                "overall_mm_s_rms": worst.overall_velocity_mm_s_rms},
            "active_alarms": n_open,
            "worst_severity": max(sev, key=severity_rank) if sev else None,
        })
    return out


def get_machine(s: Session, machine_id: str) -> Machine | None:
    return s.get(Machine, machine_id)


def mode_json(mo: Mode) -> dict:
    """A stored mode; ``valid`` false and ``problem`` (one sentence) when its values lie
    outside the registry's bounds, so neither the service nor the margins use it."""
    d = mo.values()
    problem = mode_problem(mo, mo.machine_id)
    d.update({"id": mo.id, "updated_at": iso_utc(mo.updated_at), "valid": problem is None, "problem": problem})
    return d


def baseline_restart_json(r: BaselineRestart) -> dict:
    return {"id": r.id, "machine": r.machine_id, "point": r.point_id, "comment": r.comment,
            "requested_by": r.requested_by, "requested_at": iso_utc(r.requested_at),
            "applied_at": iso_utc(r.applied_at)}


def _limits_for(m: Machine, p: MeasurementPoint):
    try:
        return zone_limits(m.machine_class, m.limits_mm_s, p.limits_mm_s)
    except ValueError:
        return None


def spectrum_json(sn: SpectrumSnapshot, max_bins: int = MAX_SPECTRUM_BINS) -> dict:
    """A stored spectrum for the API, at most ``max_bins`` bins. Ingest keeps every
    stored spectrum finite (``samples_absurd``, docs/mqtt.md); a bin that is not (stored
    before that check, e.g. a float32 overflow) is written as null, counted in
    ``non_finite_bins``, so the answer stays valid JSON."""
    amp = sn.amplitude_array().astype(np.float64)
    f = sn.freq_hz()
    if amp.size > max_bins:
        # Keep the largest bin of each bucket so no peak disappears.
        k = int(np.ceil(amp.size / max_bins))
        n = amp.size // k * k
        a2 = amp[:n].reshape(-1, k)
        idx = a2.argmax(axis=1) + np.arange(a2.shape[0]) * k
        f, amp = f[idx], amp[idx]
    return {"id": sn.id, "machine": sn.machine_id, "point": sn.point_id, "ts": iso_utc(sn.ts),
            "kind": sn.kind, "unit": sn.unit, "scaling": sn.scaling,
            "df_hz": sn.df_hz, "evidence": sn.evidence,
            "freq_hz": np.round(f, 4).tolist(),
            "amplitude": [float(f"{v:.5g}") if math.isfinite(v) else None for v in amp.tolist()],
            "non_finite_bins": int(amp.size - np.count_nonzero(np.isfinite(amp)))}


def _latest_spectra(s: Session, machine_id: str) -> list[SpectrumSnapshot]:
    inner = aliased(SpectrumSnapshot)
    newest_id = (
        select(inner.id)
        .where(inner.machine_id == MeasurementPoint.machine_id, inner.point_id == MeasurementPoint.id)
        .order_by(inner.ts.desc(), (inner.kind == "velocity").desc())
        .limit(1)
        .correlate(MeasurementPoint)
        .scalar_subquery()
    )
    return s.scalars(
        select(SpectrumSnapshot)
        .join(MeasurementPoint, SpectrumSnapshot.id == newest_id)
        .where(MeasurementPoint.machine_id == machine_id, MeasurementPoint.active.is_(True))
    ).all()


def machine_detail(s: Session, m: Machine) -> dict:
    """One machine: points, modes, latest readings and spectra, margins, open alarms."""
    points = s.scalars(select(MeasurementPoint).where(
        MeasurementPoint.machine_id == m.id, MeasurementPoint.active.is_(True)).order_by(MeasurementPoint.position)).all()
    modes = s.scalars(select(Mode).where(Mode.machine_id == m.id).order_by(Mode.position, Mode.id)).all()
    latest = {r.point_id: r for r in _latest_per_point(s, [m.id])}
    newest = max(latest.values(), key=lambda r: r.ts) if latest else None
    speed = newest.speed_hz if newest else None
    n_open = s.scalar(select(func.count()).select_from(Alarm).where(
        Alarm.machine_id == m.id, Alarm.state.in_(OPEN_STATES))) or 0
    pts = []
    for p in points:
        me = latest.get(p.id)
        view = evaluation_view(me.evaluation if me is not None else None)
        lim = _limits_for(m, p)
        limits = list(lim.as_tuple()) if lim else view["zone_limits_mm_s"]
        overall = view["features"].get("overall", {})
        pts.append({
            "id": p.id, "direction": p.direction, "quantity": p.quantity, "unit": p.unit,
            "zone_limits_mm_s": limits,
            "zone_limits_source": lim.source if lim else view["zone_limits_source"],
            "latest": None if me is None else {
                "ts": iso_utc(me.ts), "zone": me.zone, "overall_mm_s_rms": me.overall_velocity_mm_s_rms,
                "speed_hz": me.speed_hz, "speed_source": me.speed_source,
                "orders": me.orders, "peaks": me.peaks},
            # The learned baseline of the overall level (mm/s RMS; None while learning).
            "baseline_mm_s_rms": overall.get("baseline_median"),
            "features": [feature_json(f) for f in view["features"].values()],
            "growth_ignored": view["growth_ignored"],
        })
    return {
        "id": m.id, "name": m.name or m.id, "location": m.location, "class": m.machine_class,
        "speed_range_rpm": [m.speed_min_rpm, m.speed_max_rpm],
        "excitation_orders": m.excitation_orders, "line_frequency_hz": m.line_frequency_hz,
        "state": _machine_state(n_open, newest.ts if newest else None),
        "active_alarms": n_open,
        "speed_hz": speed, "speed_rpm": None if speed is None else speed * 60.0,
        "last_reading_at": iso_utc(newest.ts) if newest else None,
        "points": pts,
        "modes": [mode_json(x) for x in modes],
        "margins": current_margins(m, list(modes), speed, newest.evaluation if newest else None,
                                   newest.stored_at if newest else None),
        "latest_spectra": [spectrum_json(sn) for sn in _latest_spectra(s, m.id)],
        "baseline_restarts": [baseline_restart_json(r) for r in recent_baseline_restarts(s, m.id)],
    }


def mode_history(s: Session, machine_id: str, limit: int = 200) -> list[dict]:
    rows = s.scalars(select(ModeHistory).where(ModeHistory.machine_id == machine_id)
                     .order_by(ModeHistory.changed_at.desc(), ModeHistory.id.desc()).limit(limit))
    return [{"id": h.id, "mode": h.mode_name, "change": h.change, "changed_by": h.changed_by,
             "changed_at": iso_utc(h.changed_at), "old": h.old_values, "new": h.new_values} for h in rows]


# ----------------------------------------------------------------------------- trends


def trends(s: Session, m: Machine, point_ids: list[str], t0: dt.datetime, t1: dt.datetime,
           max_points: int) -> list[dict]:
    """Per point: overall velocity (mm/s RMS), speed (Hz) and order amplitudes (1x, 2x and
    each excitation order, velocity mm/s peak) in [t0, t1], at most ``max_points``
    readings, with the ISO 20816 zone boundaries of the point and the learned baseline of
    each feature as the detector stored it with each kept reading (None while learning).

    Two statements per point: the cheap columns over the indexed (machine, point, ts)
    range, decimated in numpy (the largest overall level of each time bucket, so a short
    excursion is never averaged away), then the JSON columns of the rows kept."""
    points = {p.id: p for p in s.scalars(select(MeasurementPoint).where(MeasurementPoint.machine_id == m.id))}
    want = [_order_label(o) for o in sorted({1.0, 2.0, *(float(o) for o in (m.excitation_orders or ()))})]
    out = []
    for pid in point_ids:
        rows = s.execute(
            select(Measurement.id, Measurement.ts, Measurement.overall_velocity_mm_s_rms)
            .where(Measurement.machine_id == m.id, Measurement.point_id == pid,
                   Measurement.ts >= t0, Measurement.ts <= t1)
            .order_by(Measurement.ts)
        ).all()
        n_total = len(rows)
        if n_total:
            ids = np.fromiter((r[0] for r in rows), dtype=np.int64, count=n_total)
            ts = np.fromiter((r[1].timestamp() for r in rows), dtype=np.float64, count=n_total)
            ov = np.fromiter((np.nan if r[2] is None else r[2] for r in rows), dtype=np.float64, count=n_total)
            ids = ids[decimate_indices(ts, ov, max_points)]
        else:
            ids = np.empty(0, dtype=np.int64)
        kept = s.execute(
            select(Measurement.ts, Measurement.overall_velocity_mm_s_rms, Measurement.speed_hz,
                   Measurement.orders, Measurement.zone, Measurement.evaluation)
            .where(Measurement.id.in_(ids.tolist())).order_by(Measurement.ts)
        ).all() if ids.size else []
        got = [{lab: v for lab, v in ((_order_label(o), _order_value(o)) for o in (r.orders or [])) if lab}
               for r in kept]
        labels = want + [lab for lab in dict.fromkeys(k for g in got for k in g) if lab not in want]
        labels = [lab for lab in labels if any(g.get(lab) is not None for g in got)]
        views = [evaluation_view(r.evaluation) for r in kept]
        baseline: dict[str, list[float | None]] = {}
        for name in ("overall", *labels):
            b = [v["features"].get(name, {}).get("baseline_median") for v in views]
            if any(x is not None for x in b):
                baseline[name] = b
        p = points.get(pid)
        lim = _limits_for(m, p) if p is not None else None
        out.append({
            "point": pid, "readings_in_range": n_total, "returned": len(kept),
            "ts": [r.ts.timestamp() for r in kept],
            "overall_mm_s_rms": [r.overall_velocity_mm_s_rms for r in kept],
            "speed_hz": [r.speed_hz for r in kept],
            "zone": [r.zone for r in kept],
            "orders": {lab: [g.get(lab) for g in got] for lab in labels},
            "units": {"overall": "mm/s RMS", **{lab: "mm/s peak" for lab in labels}},
            "baseline": baseline,
            "zone_limits_mm_s": list(lim.as_tuple()) if lim else None,
        })
    return out


def _order_label(o: Any) -> str | None:
    if isinstance(o, dict) and "order" in o:
        return f"{float(o['order']):g}x"
    return None


def _order_value(o: dict) -> float | None:
    # Velocity, mm/s peak, as detection's order features use (not the point's own unit).
    v = o.get("velocity_mm_s")
    return None if v is None else float(v)


def decimate_indices(ts: np.ndarray, values: np.ndarray, max_points: int) -> np.ndarray:
    """Indices of at most ``max_points`` samples: in each of ``max_points`` equal time
    buckets, the sample with the largest value (first sample when all are NaN)."""
    n = ts.size
    if n <= max_points:
        return np.arange(n)
    span = ts[-1] - ts[0]
    if span <= 0:
        return np.linspace(0, n - 1, max_points).astype(np.int64)
    b = np.minimum(((ts - ts[0]) / span * max_points).astype(np.int64), max_points - 1)
    v = np.where(np.isnan(values), -np.inf, values)
    # Sort by bucket, then by value descending; the first of each bucket is its peak.
    order = np.lexsort((-v, b))
    first = np.ones(n, dtype=bool)
    first[1:] = b[order][1:] != b[order][:-1]
    return np.sort(order[first])


# ----------------------------------------------------------------------------- alarms


def alarm_json(a: Alarm, with_transitions: bool = False) -> dict:
    d = alarm_as_json(a)  # one shape for REST and for the MQTT alarm events
    if with_transitions:
        d["transitions"] = [
            {"id": t.id, "transition": t.transition, "severity": t.severity, "state": t.state,
             "at": iso_utc(t.at), "user": t.user, "evidence": t.evidence,
             "spectrum_id": t.spectrum_snapshot_id}
            for t in a.transitions
        ]
    return d


def find_alarms(s: Session, *, state: str | None = None, kind: str | None = None,
                severity: str | None = None, machine: str | None = None, point: str | None = None,
                since: dt.datetime | None = None, until: dt.datetime | None = None,
                before_id: int | None = None, limit: int = 50) -> tuple[list[Alarm], int | None]:
    """Alarms newest first; keyset pagination on id. Returns (rows, next before_id)."""
    q = select(Alarm)
    if state == "open":
        q = q.where(Alarm.state.in_(OPEN_STATES))
    elif state:
        q = q.where(Alarm.state == state)
    if kind:
        q = q.where(Alarm.kind == kind)
    if severity:
        q = q.where(Alarm.severity == severity)
    if machine:
        q = q.where(Alarm.machine_id == machine)
    if point:
        q = q.where(Alarm.point_id == point)
    if since:
        q = q.where(Alarm.raised_at >= since)
    if until:
        q = q.where(Alarm.raised_at <= until)
    if before_id is not None:
        q = q.where(Alarm.id < before_id)
    rows = s.scalars(q.order_by(Alarm.id.desc()).limit(limit + 1)).all()
    nxt = rows[limit - 1].id if len(rows) > limit else None
    return list(rows[:limit]), nxt


def acknowledge(s: Session, a: Alarm, user: str, comment: str) -> Alarm:
    """Mark an active alarm acknowledged by ``user``; the store records the transition."""
    from monitor.store.writes import acknowledge_alarm

    a = acknowledge_alarm(s, a.id, user, comment or None)
    s.commit()
    return a


def machine_list(s: Session) -> list[dict]:
    """Ids and names of active machines (for filter menus)."""
    return [{"id": i, "name": n or i} for i, n in s.execute(
        select(Machine.id, Machine.name).where(Machine.active.is_(True)).order_by(Machine.position, Machine.id))]
