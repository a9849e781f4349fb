"""The spectra kept as the evidence of alarm transitions (docs/alarms.md, "Evidence spectra").

- The transitions of a waveform keep that reading's own spectra (native and velocity; the
  bearing envelope spectrum too when a bearing feature's alarm moves), age 0 s.
- The transitions of a speed message (resonance alarms, which move on speed alone) refer
  to the machine's latest velocity spectrum of each point at or before the speed's time,
  with its age: that of the newest reading this process analysed (the batch's own
  included, :class:`LatestSpectra`), stored then if the cadence did not keep it, or the
  newest stored one when that is newer (another process's, or from before a restart).

A spectrum is stored once whoever refers to it (the snapshot cadence, a redelivery, a
second transition) and is marked evidence, so retention never thins it
(monitor/store/writes.py :func:`~monitor.store.writes.keep_evidence_snapshots`).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy.orm import Session

from monitor.analysis.waveform import ReadingAnalysis, Spectrum
from monitor.detection.alarms import Transition
from monitor.detection.causes import machine_hints
from monitor.detection.results import ReadingEvaluation
from monitor.detection.symptoms import bearing_orders, point_symptoms
from monitor.model.registry import Machine
from monitor.model.timefmt import iso_utc
from monitor.store import reads
from monitor.store.writes import (
    keep_evidence_snapshots,
    mark_evidence,
    orders_json,
    snapshot_rows,
    spectrum_row,
    to_datetime,
)

#: The subjects of the growth alarms of bearing defect lines (monitor/detection/features.py).
BEARING_SUBJECT_PREFIX = "bearing_"


@dataclass(frozen=True)
class Evidence:
    """What a reading's transitions refer to: ``spectrum_id`` the velocity spectrum (of the
    first point, for a speed message) and ``spectra`` one entry per spectrum listed in the
    evidence: ``point``, ``kind`` (``velocity`` or ``envelope``), ``spectrum_id``, ``ts``
    (ISO 8601 UTC of the spectrum's reading) and ``age_s`` (s from that reading to the
    transition)."""

    spectrum_id: int | None = None
    spectra: list[dict[str, Any]] = field(default_factory=list)


def moves_bearing_alarm(transitions: Sequence[Transition]) -> bool:
    """Whether any of ``transitions`` is of a bearing defect line's growth alarm."""
    return any(t.kind == "amplitude_growth" and str(t.alarm.get("subject", "")).startswith(BEARING_SUBJECT_PREFIX)
               for t in transitions)


def moves_growth_alarm(transitions: Sequence[Transition]) -> bool:
    """Whether any of ``transitions`` is of an amplitude-growth alarm (bearing lines included)."""
    return any(t.kind == "amplitude_growth" for t in transitions)


def reading_hints(analysis: ReadingAnalysis, evaluation: ReadingEvaluation | None,
                  machine: Machine) -> list[dict[str, Any]]:
    """The likely-cause hints of one reading (docs/diagnosis.md), for the evidence of its
    growth transitions: measured from the reading's stored forms (order rows, growth
    features, zone limits, margin table) and its velocity spectrum, as the dashboard
    measures a stored reading (monitor/store/reads/machines.py)."""
    point = machine.point(analysis.point)
    ev = evaluation.to_json() if evaluation is not None else {}
    spectrum = analysis.velocity_spectrum
    ps = point_symptoms(
        analysis.point, point.direction, speed_hz=analysis.speed_hz,
        overall_mm_s_rms=analysis.overall_velocity_mm_s_rms,
        zone_limits_mm_s=ev.get("zone_limits_mm_s"), orders=orders_json(analysis),
        features=ev.get("features") or (), spectrum=(spectrum.freq_hz, spectrum.amplitude),
        spectrum_ts=analysis.ts, line_frequency_hz=machine.line_frequency_hz,
        bearing_orders=bearing_orders(machine.settings))
    margins = ev.get("margins") or ()
    hints = machine_hints([ps] if ps is not None else [], margins, machine.excitation_orders)
    return [h.to_json() for h in hints]


def _entry(point: str, kind: str, spectrum_id: int, spectrum_ts: float, at: float) -> dict[str, Any]:
    return {"point": point, "kind": kind, "spectrum_id": spectrum_id, "ts": iso_utc(spectrum_ts),
            "age_s": round(max(0.0, at - spectrum_ts), 6)}


def for_reading(s: Session, analysis: ReadingAnalysis, transitions: Sequence[Transition]) -> Evidence:
    """Keep the reading's spectra as the evidence of its ``transitions``."""
    rows = snapshot_rows(analysis, evidence=True, envelope=moves_bearing_alarm(transitions))
    ids = keep_evidence_snapshots(s, rows)
    listed = [_entry(analysis.point, row["kind"], sid, analysis.ts, analysis.ts)
              for row, sid in zip(rows, ids, strict=True) if row["kind"] != "native"]
    velocity = next((e["spectrum_id"] for e in listed if e["kind"] == "velocity"), ids[0] if ids else None)
    return Evidence(velocity, listed)


class LatestSpectra:
    """The velocity spectrum of each point's newest reading this process committed
    (epoch s, spectrum), kept whether or not the snapshot cadence stored it: a speed
    message's evidence refers to it (storing it then) when it is newer than any stored."""

    def __init__(self) -> None:
        self._by_point: dict[tuple[str, str], tuple[float, Spectrum]] = {}

    def remember(self, analyses: Sequence[ReadingAnalysis]) -> None:
        """After a commit: the batch's analysed readings."""
        for a in analyses:
            key = (a.machine, a.point)
            held = self._by_point.get(key)
            if held is None or a.ts >= held[0]:
                self._by_point[key] = (a.ts, a.velocity_spectrum)

    def newest(self, machine: str, until: float, batch: Sequence[ReadingAnalysis]) -> dict[str, tuple[float, Spectrum]]:
        """Point -> (epoch s, velocity spectrum) of the newest reading at or before ``until``
        among those remembered and ``batch`` (the readings of the batch being committed)."""
        out = {p: held for (m, p), held in self._by_point.items() if m == machine and held[0] <= until}
        for a in batch:
            if a.machine == machine and a.ts <= until and (a.point not in out or a.ts >= out[a.point][0]):
                out[a.point] = (a.ts, a.velocity_spectrum)
        return out

    def forget(self, machine: str) -> None:
        """A retired machine's spectra are no longer anyone's evidence."""
        self.keep_points(machine, ())

    def keep_points(self, machine: str, points: Iterable[str]) -> None:
        """Only ``points`` remain of ``machine``: a retired point's spectrum is no evidence."""
        kept = set(points)
        for key in [k for k in self._by_point if k[0] == machine and k[1] not in kept]:
            del self._by_point[key]


def for_speed(s: Session, machine: str, ts: float, fresh: Mapping[str, tuple[float, Spectrum]]) -> Evidence:
    """The machine's latest velocity spectrum of each point at or before ``ts`` (epoch s,
    the speed message's time): the newer of ``fresh`` (:meth:`LatestSpectra.newest`,
    stored now if it was not) and the newest stored."""
    stored = reads.newest_velocity_spectra(s, machine, to_datetime(ts))
    listed: list[dict[str, Any]] = []
    referred: list[int] = []
    for point in sorted(set(stored) | set(fresh)):
        new, kept = fresh.get(point), stored.get(point)
        if new is not None and (kept is None or to_datetime(new[0]) >= kept[1]):
            (sid,) = keep_evidence_snapshots(s, [spectrum_row(machine, point, new[0], "velocity", new[1],
                                                              evidence=True)])
            listed.append(_entry(point, "velocity", sid, new[0], ts))
        elif kept is not None:
            referred.append(kept[0])
            listed.append(_entry(point, "velocity", kept[0], kept[1].timestamp(), ts))
    mark_evidence(s, referred)
    return Evidence(listed[0]["spectrum_id"] if listed else None, listed)
