"""Tables of stored data for export (CSV and Parquet from the API, docs/import-export.md):
a machine's trends and its stored spectra, one row per reading or per spectrum bin, the
unit of each value in its column's name.

The trend table takes its values from :func:`monitor.store.reads.trends.trends` (the JSON
trend API's own read, undecimated), so an export and the API never disagree. Each table
is counted before it is read and refused above the caller's row limit
(:class:`TooManyRows`), so an export's size is bounded before any row is loaded.
"""

from __future__ import annotations

import datetime as dt
import re
from typing import Any

import numpy as np
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from monitor.store.models import Machine, Measurement, SpectrumSnapshot
from monitor.store.reads.trends import trends

#: The features a trend export may name besides order labels (``1x``, ``2x``, ``7x`` ...).
TREND_FEATURES = ("overall", "speed", "zone", "flags")
#: An order label as the trend API names orders: ``1x``, ``2x``, ``0.5x``.
ORDER_LABEL = re.compile(r"[0-9]{1,3}(\.[0-9]{1,3})?x")
#: Column-name spelling of each unit (a column name holds no ``/`` or ``^``).
_UNIT_TOKEN = {"m/s^2": "m_s2", "g": "g", "mm/s": "mm_s", "in/s": "in_s", "um": "um", "mil": "mil"}
_SCALING_TOKEN = {"peak": "pk", "rms": "rms"}

#: Column name -> values (a list, or a numpy array whose NaN are empty cells).
Columns = dict[str, Any]


class TooManyRows(ValueError):
    """The table would hold ``rows`` rows, more than ``limit``."""

    def __init__(self, rows: int, limit: int) -> None:
        super().__init__(f"the export would hold {rows} rows, more than max_rows={limit}")
        self.rows = rows
        self.limit = limit


def check_features(names: list[str]) -> list[str]:
    """``names`` when each is a trend feature or an order label; ValueError naming the first
    that is neither."""
    for n in names:
        if n not in TREND_FEATURES and not ORDER_LABEL.fullmatch(n):
            raise ValueError(f"feature {n!r} is not one of {', '.join(TREND_FEATURES)} or an order "
                             "label such as 1x")
    return names


def unit_token(unit: str) -> str:
    """A unit as spelt inside a column name (``mm/s`` -> ``mm_s``)."""
    return _UNIT_TOKEN.get(unit) or re.sub(r"[^A-Za-z0-9]+", "_", unit).strip("_")


def amplitude_column(unit: str, scaling: str) -> str:
    """The column of a spectrum's amplitudes: ``amplitude_mm_s_pk``, ``amplitude_m_s2_rms``."""
    return f"amplitude_{unit_token(unit)}_{_SCALING_TOKEN.get(scaling, scaling)}"


def trend_rows(s: Session, m: Machine, point_ids: list[str], t0: dt.datetime, t1: dt.datetime) -> int:
    """Readings of ``point_ids`` with ``t0 <= ts <= t1``: the rows of their trend table."""
    if not point_ids:
        return 0
    return int(s.scalar(select(func.count()).select_from(Measurement).where(
        Measurement.machine_id == m.id, Measurement.point_id.in_(point_ids),
        Measurement.ts >= t0, Measurement.ts <= t1)) or 0)


def trend_table(s: Session, m: Machine, point_ids: list[str], t0: dt.datetime, t1: dt.datetime,
                features: list[str], max_rows: int) -> Columns:
    """Every reading of ``point_ids`` in [t0, t1], oldest first by point: ``machine``,
    ``point``, ``time_utc`` (aware datetime), then per feature asked for (all when
    ``features`` is empty): ``overall_velocity_mm_s_rms``, ``speed_hz``, ``zone`` (ISO 20816
    zone letter), ``health_flags`` (the checks sensor health failed, ``;``-separated; empty:
    accepted) and per order ``order_{n}x_velocity_mm_s_pk`` and ``order_{n}x_phase_deg``.
    :class:`TooManyRows` above ``max_rows`` readings, before any is read."""
    n = trend_rows(s, m, point_ids, t0, t1)
    if n > max_rows:
        raise TooManyRows(n, max_rows)
    per_point = trends(s, m, point_ids, t0, t1, max(n, 2)) if n else []
    wanted = features or [*TREND_FEATURES, *dict.fromkeys(
        lab for p in per_point for lab in p["orders"])]
    cols: Columns = {"machine": [], "point": [], "time_utc": []}
    simple = {"overall": ("overall_velocity_mm_s_rms", "overall_mm_s_rms"), "speed": ("speed_hz", "speed_hz"),
              "zone": ("zone", "zone"), "flags": ("health_flags", "flags")}
    for f in wanted:
        if f in simple:
            cols[simple[f][0]] = []
        else:
            cols[f"order_{f}_velocity_mm_s_pk"] = []
            cols[f"order_{f}_phase_deg"] = []
    for p in per_point:
        k = p["returned"]
        cols["machine"] += [m.id] * k
        cols["point"] += [p["point"]] * k
        cols["time_utc"] += [dt.datetime.fromtimestamp(t, dt.UTC) for t in p["ts"]]
        for f in wanted:
            if f == "flags":
                cols["health_flags"] += [";".join(x) for x in p["flags"]]
            elif f in simple:
                cols[simple[f][0]] += p[simple[f][1]]
            else:
                cols[f"order_{f}_velocity_mm_s_pk"] += p["orders"].get(f, [None] * k)
                cols[f"order_{f}_phase_deg"] += p["phase_deg"].get(f, [None] * k)
    return cols


def spectrum_rows(s: Session, m: Machine, point_ids: list[str], kind: str, t0: dt.datetime,
                  t1: dt.datetime) -> int:
    """Bins of the stored spectra of ``kind`` of ``point_ids`` in [t0, t1]: the rows of their
    spectrum table."""
    if not point_ids:
        return 0
    return int(s.scalar(select(func.coalesce(func.sum(SpectrumSnapshot.n_bins), 0)).where(
        SpectrumSnapshot.machine_id == m.id, SpectrumSnapshot.point_id.in_(point_ids),
        SpectrumSnapshot.kind == kind, SpectrumSnapshot.ts >= t0, SpectrumSnapshot.ts <= t1)) or 0)


def spectrum_table(s: Session, m: Machine, point_ids: list[str], kind: str, t0: dt.datetime,
                   t1: dt.datetime, max_rows: int) -> Columns:
    """Every bin of the stored spectra of ``kind`` of ``point_ids`` in [t0, t1], by time:
    ``machine``, ``point``, ``time_utc``, ``spectrum_id``, ``kind``, ``frequency_hz`` and the
    amplitude in a column named by its unit and scaling (:func:`amplitude_column`; spectra
    of different units fill different columns, empty elsewhere). Amplitudes are the stored
    float32 values, every bin (the JSON spectrum thins above 8192 bins and rounds to five
    digits). :class:`TooManyRows` above ``max_rows`` bins, before any spectrum is read."""
    n = spectrum_rows(s, m, point_ids, kind, t0, t1)
    if n > max_rows:
        raise TooManyRows(n, max_rows)
    cols: Columns = {"machine": [], "point": [], "time_utc": [], "spectrum_id": [], "kind": [],
                     "frequency_hz": []}
    if not n:
        return cols
    rows = list(s.scalars(select(SpectrumSnapshot).where(
        SpectrumSnapshot.machine_id == m.id, SpectrumSnapshot.point_id.in_(point_ids),
        SpectrumSnapshot.kind == kind, SpectrumSnapshot.ts >= t0, SpectrumSnapshot.ts <= t1)
        .order_by(SpectrumSnapshot.ts, SpectrumSnapshot.point_id, SpectrumSnapshot.id)))
    amps = [sn.amplitude_array() for sn in rows]
    total = sum(a.size for a in amps)
    # float32 as stored (NaN where a bin belongs to another unit's column: written empty).
    amp: dict[str, np.ndarray] = {}
    freq = np.empty(total, dtype=np.float64)
    at = 0
    for sn, a in zip(rows, amps, strict=True):
        k = int(a.size)
        cols["machine"] += [m.id] * k
        cols["point"] += [sn.point_id] * k
        cols["time_utc"] += [sn.ts] * k
        cols["spectrum_id"] += [sn.id] * k
        cols["kind"] += [sn.kind] * k
        freq[at:at + k] = sn.freq_hz()[:k]
        name = amplitude_column(sn.unit, sn.scaling)
        amp.setdefault(name, np.full(total, np.nan, dtype=np.float32))[at:at + k] = a
        at += k
    cols["frequency_hz"] = freq
    cols.update(amp)
    return cols
