"""Reads of stored spectra: one by id, each point's newest (or newest velocity spectrum up
to an instant, for alarm evidence), a point's spectra over a time range (a waterfall), the
spectrum a point's baseline was learned from, in the API's JSON shape."""

from __future__ import annotations

import datetime as dt
import math
from typing import Any

import numpy as np
from sqlalchemy import and_, or_, select
from sqlalchemy.orm import Session, aliased

from monitor.model.timefmt import iso_utc
from monitor.store.models import BaselineRestart, Measurement, MeasurementPoint, SpectrumSnapshot

#: Spectra longer than this are thinned (peak per bucket) before they go to the browser.
MAX_SPECTRUM_BINS = 8192


def get_spectrum(s: Session, spectrum_id: int) -> SpectrumSnapshot | None:
    """One stored spectrum, or None."""
    return s.get(SpectrumSnapshot, spectrum_id)


def latest_spectra(s: Session, machine_id: str) -> list[SpectrumSnapshot]:
    """The newest stored spectrum of each active point of a machine (velocity when both
    kinds share the newest instant), in one statement."""
    inner = aliased(SpectrumSnapshot)
    newest_id = (
        select(inner.id)
        .where(inner.machine_id == MeasurementPoint.machine_id, inner.point_id == MeasurementPoint.id)
        .order_by(inner.ts.desc(), (inner.kind == "velocity").desc())
        .limit(1)
        .correlate(MeasurementPoint)
        .scalar_subquery()
    )
    return list(s.scalars(
        select(SpectrumSnapshot)
        .join(MeasurementPoint, SpectrumSnapshot.id == newest_id)
        .where(MeasurementPoint.machine_id == machine_id, MeasurementPoint.active.is_(True))
    ))


def newest_velocity_spectra(s: Session, machine_id: str, until: dt.datetime) -> dict[str, tuple[int, dt.datetime]]:
    """The newest stored velocity spectrum of each active point of a machine at or before
    ``until``: point -> (spectrum id, its time), in one statement (points with none left
    out). The evidence a speed message's alarm transition refers to."""
    inner = aliased(SpectrumSnapshot)
    newest_id = (
        select(inner.id)
        .where(inner.machine_id == MeasurementPoint.machine_id, inner.point_id == MeasurementPoint.id,
               inner.kind == "velocity", inner.ts <= until)
        .order_by(inner.ts.desc())
        .limit(1)
        .correlate(MeasurementPoint)
        .scalar_subquery()
    )
    rows = s.execute(
        select(SpectrumSnapshot.point_id, SpectrumSnapshot.id, SpectrumSnapshot.ts)
        .join(MeasurementPoint, SpectrumSnapshot.id == newest_id)
        .where(MeasurementPoint.machine_id == machine_id, MeasurementPoint.active.is_(True))
    ).all()
    return {p: (int(i), ts) for p, i, ts in rows}


def reading_speeds(s: Session, spectra: list[SpectrumSnapshot]) -> dict[int, float | None]:
    """The running speed (Hz) the analysis used for the reading of each stored spectrum:
    spectrum id -> speed (None when the reading had none or is no longer stored), in one
    statement. The speed a spectrum's markers (1x, its harmonics) are drawn at."""
    if not spectra:
        return {}
    rows = s.execute(
        select(Measurement.machine_id, Measurement.point_id, Measurement.ts, Measurement.speed_hz)
        .where(Measurement.machine_id.in_({sn.machine_id for sn in spectra}),
               Measurement.ts.in_({sn.ts for sn in spectra}))).all()
    speeds = {(m, p, ts): v for m, p, ts, v in rows}
    return {sn.id: speeds.get((sn.machine_id, sn.point_id, sn.ts)) for sn in spectra}


def spectrum_json(sn: SpectrumSnapshot, max_bins: int = MAX_SPECTRUM_BINS,
                  speed_hz: float | None = None) -> dict[str, Any]:
    """A stored spectrum for the API, at most ``max_bins`` bins, with ``speed_hz``, the
    running speed of its reading (Hz, :func:`reading_speeds`). Ingest keeps every
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
            "df_hz": sn.df_hz, "evidence": sn.evidence, "speed_hz": speed_hz,
            "freq_hz": np.round(f, 4).tolist(),
            "amplitude": [float(f"{v:.5g}") if math.isfinite(v) else None for v in amp.tolist()],
            "non_finite_bins": int(amp.size - np.count_nonzero(np.isfinite(amp)))}


def _amplitudes_json(amp: np.ndarray) -> list[float | None]:
    return [float(f"{v:.5g}") if math.isfinite(v) else None for v in amp.tolist()]


def bucket_peaks(amp: np.ndarray, max_bins: int) -> tuple[np.ndarray, int]:
    """At most ``max_bins`` values of ``amp``: the largest of each bucket of ``k``
    neighbouring bins (a trailing part bucket dropped), and ``k`` (1: all kept)."""
    if amp.size <= max_bins:
        return amp, 1
    k = int(np.ceil(amp.size / max_bins))
    n = amp.size // k * k
    return np.nanmax(amp[:n].reshape(-1, k), axis=1), k


def waterfall(s: Session, machine_id: str, point_id: str, kind: str, since: dt.datetime, until: dt.datetime,
              max_rows: int, max_bins: int = MAX_SPECTRUM_BINS, *, by_speed: bool = False) -> dict[str, Any]:
    """A point's stored spectra of ``kind`` with ``since <= ts <= until``, oldest first, as
    the rows of a waterfall on one frequency grid (that of the newest; a spectrum on
    another grid is left out and counted in ``left_out``); at most ``max_rows`` rows,
    evenly spread over those stored (``stored`` counts them). Each row: spectrum ``id``,
    ``ts``, ``speed_hz`` of its reading (Hz; None when not kept) and ``amplitude`` in
    ``unit``; above ``max_bins`` bins each is the largest of ``bin_group`` neighbours, at
    the frequency of the bucket's first bin. ``by_speed``: the rows chosen are then
    ordered by the running speed of their readings (a run-up or coast-down's spectra
    against speed; rows without a speed last)."""
    rows = s.execute(
        select(SpectrumSnapshot, Measurement.speed_hz)
        .outerjoin(Measurement, and_(Measurement.machine_id == SpectrumSnapshot.machine_id,
                                     Measurement.point_id == SpectrumSnapshot.point_id,
                                     Measurement.ts == SpectrumSnapshot.ts))
        .where(SpectrumSnapshot.machine_id == machine_id, SpectrumSnapshot.point_id == point_id,
               SpectrumSnapshot.kind == kind, SpectrumSnapshot.ts >= since, SpectrumSnapshot.ts <= until)
        .order_by(SpectrumSnapshot.ts, SpectrumSnapshot.id)).all()
    out: dict[str, Any] = {"machine": machine_id, "point": point_id, "kind": kind, "from": iso_utc(since),
                           "to": iso_utc(until), "stored": len(rows), "left_out": 0, "unit": None,
                           "scaling": None, "df_hz": None, "bin_group": 1, "freq_hz": [], "rows": []}
    if not rows:
        return out
    newest = rows[-1][0]
    grid = (newest.f0_hz, newest.df_hz, newest.n_bins)
    same = [(sn, sp) for sn, sp in rows if (sn.f0_hz, sn.df_hz, sn.n_bins) == grid]
    if len(same) > max_rows:
        same = [same[i] for i in np.unique(np.linspace(0, len(same) - 1, max_rows).round().astype(int))]
    k = bucket_peaks(np.zeros(newest.n_bins), max_bins)[1]
    out.update(left_out=len(rows) - sum(1 for sn, _ in rows if (sn.f0_hz, sn.df_hz, sn.n_bins) == grid),
               unit=newest.unit, scaling=newest.scaling, df_hz=newest.df_hz, bin_group=k,
               freq_hz=np.round(newest.freq_hz()[: newest.n_bins // k * k: k], 4).tolist())
    out["rows"] = [{"id": sn.id, "ts": iso_utc(sn.ts), "speed_hz": sp, "evidence": sn.evidence,
                    "amplitude": _amplitudes_json(bucket_peaks(sn.amplitude_array().astype(np.float64), max_bins)[0])}
                   for sn, sp in same]
    if by_speed:
        out["rows"].sort(key=lambda r: (r["speed_hz"] is None, r["speed_hz"] or 0.0))
    return out


def baseline_spectrum(s: Session, machine_id: str, point_id: str, kind: str) -> tuple[SpectrumSnapshot | None,
                                                                                      dt.datetime | None]:
    """The spectrum a point's learned baseline describes: its first stored spectrum of
    ``kind`` after the last applied baseline restart of the point (or of every point), or
    its first stored one when none was applied; and the restart's time (None)."""
    since = s.scalar(
        select(BaselineRestart.applied_at)
        .where(BaselineRestart.machine_id == machine_id, BaselineRestart.applied_at.is_not(None),
               or_(BaselineRestart.point_id.is_(None), BaselineRestart.point_id == point_id))
        .order_by(BaselineRestart.applied_at.desc()).limit(1))
    q = select(SpectrumSnapshot).where(SpectrumSnapshot.machine_id == machine_id,
                                       SpectrumSnapshot.point_id == point_id, SpectrumSnapshot.kind == kind)
    if since is not None:
        q = q.where(SpectrumSnapshot.ts >= since)
    return s.scalars(q.order_by(SpectrumSnapshot.ts, SpectrumSnapshot.id).limit(1)).first(), since


def newest_spectrum(s: Session, machine_id: str, point_id: str, kind: str) -> SpectrumSnapshot | None:
    """A point's newest stored spectrum of ``kind``, or None."""
    return s.scalars(select(SpectrumSnapshot).where(
        SpectrumSnapshot.machine_id == machine_id, SpectrumSnapshot.point_id == point_id,
        SpectrumSnapshot.kind == kind).order_by(SpectrumSnapshot.ts.desc(), SpectrumSnapshot.id.desc()).limit(1)).first()
