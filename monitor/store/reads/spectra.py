"""Reads of stored spectra: one by id, each point's newest (or newest velocity spectrum up
to an instant, for alarm evidence), in the API's JSON shape."""

from __future__ import annotations

import datetime as dt
import math
from typing import Any

import numpy as np
from sqlalchemy import select
from sqlalchemy.orm import Session, aliased

from monitor.model.timefmt import iso_utc
from monitor.store.models import MeasurementPoint, SpectrumSnapshot

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


def spectrum_json(sn: SpectrumSnapshot, max_bins: int = MAX_SPECTRUM_BINS) -> dict[str, Any]:
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
