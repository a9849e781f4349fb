"""Trends of a machine's points and of its running speed over a time range, decimated so a
short excursion is never averaged away; readings that sensor health flagged are marked."""

from __future__ import annotations

import datetime as dt
from typing import Any

import numpy as np
from sqlalchemy import select
from sqlalchemy.orm import Session

from monitor.store.models import Machine, Measurement, MeasurementPoint, SpeedReadingRow
from monitor.store.reads.evaluations import evaluation_view, point_zone_limits
from monitor.store.reads.speeds import FIRST_FLAG, SPEED_TOPIC, health_flags


def trends(s: Session, m: Machine, point_ids: list[str], t0: dt.datetime, t1: dt.datetime,
           max_points: int) -> list[dict[str, Any]]:
    """Per point: overall velocity (mm/s RMS), speed (Hz) and order amplitudes (1x, 2x and
    each excitation order, velocity mm/s peak; their phase, degrees of lag after the
    once-per-revolution pulse, where readings carried pulses) in [t0, t1], at most
    ``max_points`` readings, with the ISO 20816 zone boundaries of the point, the learned
    baseline of each feature as the detector stored it with each kept reading (None while
    learning) and ``flags``: per kept reading the checks sensor health failed (empty:
    accepted). A flagged reading's levels are no machine levels (a spike, a clipped or dead
    sensor): they are returned, marked, for the chart to draw apart, never as the trend.

    Two statements per point: the cheap columns over the indexed (machine, point, ts)
    range, decimated in numpy (the largest overall level of each time bucket, so a short
    excursion is never averaged away; a flagged reading only where its bucket has no
    accepted one), then the JSON columns of the rows kept."""
    points = {p.id: p for p in s.scalars(select(MeasurementPoint).where(MeasurementPoint.machine_id == m.id))}
    out = []
    for pid in point_ids:
        rows = s.execute(
            select(Measurement.id, Measurement.ts, Measurement.overall_velocity_mm_s_rms, FIRST_FLAG)
            .where(Measurement.machine_id == m.id, Measurement.point_id == pid,
                   Measurement.ts >= t0, Measurement.ts <= t1)
            .order_by(Measurement.ts)
        ).all()
        n_total = len(rows)
        if n_total:
            ids = np.fromiter((r[0] for r in rows), dtype=np.int64, count=n_total)
            ts = np.fromiter((r[1].timestamp() for r in rows), dtype=np.float64, count=n_total)
            # A flagged reading counts as no value: it is kept only where nothing else is.
            ov = np.fromiter((np.nan if r[2] is None or r[3] is not None else r[2] for r in rows),
                             dtype=np.float64, count=n_total)
            ids = ids[decimate_indices(ts, ov, max_points)]
        else:
            ids = np.empty(0, dtype=np.int64)
        kept = s.execute(
            select(Measurement.ts, Measurement.overall_velocity_mm_s_rms, Measurement.speed_hz,
                   Measurement.orders, Measurement.zone, Measurement.evaluation, Measurement.health)
            .where(Measurement.id.in_(ids.tolist())).order_by(Measurement.ts)
        ).all() if ids.size else []
        got = [_order_values(r.orders) for r in kept]
        # In the order the analysis stores them (1x, 2x, then the excitation orders,
        # ascending); an order no kept reading has a value for is left out.
        labels = [lab for lab in dict.fromkeys(k for g in got for k in g) if any(g.get(lab) is not None for g in got)]
        views = [evaluation_view(r.evaluation) for r in kept]
        baseline: dict[str, list[float | None]] = {}
        for name in ("overall", *labels):
            b = [v["features"].get(name, {}).get("baseline_median") for v in views]
            if any(x is not None for x in b):
                baseline[name] = b
        p = points.get(pid)
        lim = point_zone_limits(m, p) if p is not None else None
        out.append({
            "point": pid, "readings_in_range": n_total, "returned": len(kept),
            "ts": [r.ts.timestamp() for r in kept],
            "overall_mm_s_rms": [r.overall_velocity_mm_s_rms for r in kept],
            "speed_hz": [r.speed_hz for r in kept],
            "zone": [r.zone for r in kept],
            "flags": [health_flags(r.health) for r in kept],
            "orders": {lab: [g.get(lab) for g in got] for lab in labels},
            "phase_deg": _order_phases(kept, labels),
            "units": {"overall": "mm/s RMS", **{lab: "mm/s peak" for lab in labels}},
            "baseline": baseline,
            "zone_limits_mm_s": list(lim.as_tuple()) if lim else None,
        })
    return out


def speed_trend(s: Session, m: Machine, t0: dt.datetime, t1: dt.datetime, max_points: int) -> dict[str, Any]:
    """The machine's running speed in [t0, t1] for the resonance map: its speed readings and
    the speeds of its readings that sensor health accepted (the speed reading where both
    have the same instant), in time order, at most ``max_points`` (in each time bucket the
    lowest and the highest speed, so an excursion towards a mode on either side stays).
    ``{"ts": [epoch s], "speed_hz": [...], "source": [...]}``; two statements."""
    merged: dict[float, tuple[float, str]] = {}
    for row in s.execute(
            select(Measurement.ts, Measurement.speed_hz, Measurement.speed_source)
            .where(Measurement.machine_id == m.id, Measurement.ts >= t0, Measurement.ts <= t1,
                   Measurement.speed_hz.is_not(None), FIRST_FLAG.is_(None))):
        merged[row.ts.timestamp()] = (float(row.speed_hz), row.speed_source or "measured")
    for sr in s.execute(select(SpeedReadingRow.ts, SpeedReadingRow.speed_hz).where(
            SpeedReadingRow.machine_id == m.id, SpeedReadingRow.ts >= t0, SpeedReadingRow.ts <= t1)):
        merged[sr.ts.timestamp()] = (float(sr.speed_hz), SPEED_TOPIC)
    times = np.array(sorted(merged), dtype=np.float64)
    speeds = np.array([merged[t][0] for t in times.tolist()], dtype=np.float64)
    if times.size > max_points:
        half = max(1, max_points // 2)
        keep = np.union1d(decimate_indices(times, speeds, half), decimate_indices(times, -speeds, max_points - half))
    else:
        keep = np.arange(times.size)
    return {"ts": times[keep].tolist(), "speed_hz": speeds[keep].tolist(),
            "source": [merged[t][1] for t in times[keep].tolist()]}


def _order_values(orders: Any) -> dict[str, float | None]:
    """The stored orders of a reading by label (``1x``, ...): velocity, mm/s peak, as
    detection's order features use (not the point's own unit)."""
    out: dict[str, float | None] = {}
    for o in orders or ():
        if isinstance(o, dict) and "order" in o:
            v = o.get("velocity_mm_s")
            out[f"{float(o['order']):g}x"] = None if v is None else float(v)
    return out


def _order_phases(kept: Any, labels: list[str]) -> dict[str, list[float | None]]:
    """The stored phase of each order label (degrees, None where a reading had no pulses);
    an order no kept reading has a phase for is left out."""
    got = [{f"{float(o['order']):g}x": o.get("phase_deg") for o in r.orders or ()
            if isinstance(o, dict) and "order" in o} for r in kept]
    return {lab: [g.get(lab) for g in got] for lab in labels if any(g.get(lab) is not None for g in got)}


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
