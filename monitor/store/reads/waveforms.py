"""Reads of stored raw time waveforms: a machine's list (without samples), one by id with
its samples, in the API's JSON shape."""

from __future__ import annotations

import datetime as dt
from typing import Any

import numpy as np
from sqlalchemy import select
from sqlalchemy.orm import Session, defer

from monitor.model.timefmt import iso_utc
from monitor.store.models import WaveformSnapshot


def get_waveform(s: Session, waveform_id: int) -> WaveformSnapshot | None:
    """One stored waveform, or None."""
    return s.get(WaveformSnapshot, waveform_id)


def find_waveforms(s: Session, machine_id: str, point_id: str | None, since: dt.datetime,
                   until: dt.datetime, limit: int) -> list[WaveformSnapshot]:
    """A machine's stored waveforms (of ``point_id``, or every point) with ``since <= ts <=
    until``, newest first, at most ``limit``; their samples are not loaded."""
    q = (select(WaveformSnapshot).options(defer(WaveformSnapshot.samples))
         .where(WaveformSnapshot.machine_id == machine_id, WaveformSnapshot.ts >= since,
                WaveformSnapshot.ts <= until))
    if point_id is not None:
        q = q.where(WaveformSnapshot.point_id == point_id)
    return list(s.scalars(q.order_by(WaveformSnapshot.ts.desc(), WaveformSnapshot.id.desc()).limit(limit)))


def waveform_json(w: WaveformSnapshot, *, with_samples: bool = False) -> dict[str, Any]:
    """A stored waveform for the API: times ISO 8601 UTC, ``fs_hz`` Hz, ``speed_hz`` the
    running speed its analysis used (Hz), ``evidence``; with ``with_samples`` the
    ``samples`` in ``unit``, each the stored float32 written exactly (sample ``k`` at ``k /
    fs_hz`` s after ``ts``)."""
    out: dict[str, Any] = {"id": w.id, "machine": w.machine_id, "point": w.point_id, "ts": iso_utc(w.ts),
                           "fs_hz": w.fs_hz, "unit": w.unit, "speed_hz": w.speed_hz,
                           "n_samples": w.n_samples, "duration_s": w.n_samples / w.fs_hz,
                           "evidence": w.evidence}
    if with_samples:
        # float32 -> float64 is exact, and Python writes the shortest text that reads back
        # to the same float64: the JSON holds the stored values exactly.
        out["samples"] = w.sample_array().astype(np.float64).tolist()
    return out
