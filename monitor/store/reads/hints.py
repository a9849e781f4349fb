"""The likely-cause hints of a machine's latest readings, for its page and the API
(docs/diagnosis.md): measured from the rows the machine's read returns (each point's
newest measurement, its newest stored velocity spectrum, the margin table at the running
speed) by the same builder and rules the service uses for alarm evidence
(monitor/detection/symptoms.py, monitor/detection/causes.py). Nothing is stored."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from monitor.detection.causes import CAUTION, machine_hints
from monitor.detection.symptoms import PointSymptoms, bearing_orders, point_symptoms
from monitor.model.timefmt import iso_utc
from monitor.store.models import Machine, Measurement, MeasurementPoint, SpectrumSnapshot
from monitor.store.reads.evaluations import evaluation_view, point_zone_limits


def _symptoms(m: Machine, p: MeasurementPoint, me: Measurement, sn: SpectrumSnapshot | None,
              orders: dict[str, float] | None) -> PointSymptoms | None:
    ev = me.evaluation if isinstance(me.evaluation, dict) else {}
    view = evaluation_view(ev)
    lim = point_zone_limits(m, p)
    spectrum = None
    if sn is not None and sn.kind == "velocity" and sn.unit == "mm/s":
        spectrum = (sn.freq_hz(), sn.amplitude_array().astype(float))
    return point_symptoms(
        p.id, p.direction, speed_hz=me.speed_hz, overall_mm_s_rms=me.overall_velocity_mm_s_rms,
        zone_limits_mm_s=list(lim.as_tuple()) if lim else view["zone_limits_mm_s"],
        orders=me.orders or (), features=list(view["features"].values()), spectrum=spectrum,
        spectrum_ts=sn.ts.timestamp() if spectrum is not None and sn is not None else None,
        line_frequency_hz=m.line_frequency_hz, bearing_orders=orders)


def machine_hints_json(m: Machine, points: Sequence[MeasurementPoint], latest: Mapping[str, Measurement],
                       spectra: Sequence[SpectrumSnapshot], margins: Sequence[Mapping[str, Any]]) -> dict[str, Any]:
    """``{"caution", "readings", "hints"}``: the hints of the machine's latest readings
    (``Hint.to_json``, strongest first) and which reading and spectrum of each point they
    read (``point``, ``reading_ts``, ``spectrum_ts``, ISO 8601 UTC)."""
    by_point = {sn.point_id: sn for sn in spectra}
    orders = bearing_orders(m.settings)
    symptoms: list[PointSymptoms] = []
    readings = []
    for p in points:
        me = latest.get(p.id)
        if me is None:
            continue
        ps = _symptoms(m, p, me, by_point.get(p.id), orders)
        if ps is None:
            continue
        symptoms.append(ps)
        readings.append({"point": p.id, "reading_ts": iso_utc(me.ts),
                         "spectrum_ts": None if ps.spectrum_ts is None else iso_utc(ps.spectrum_ts)})
    hints = machine_hints(symptoms, margins, [float(o) for o in (m.excitation_orders or ())])
    return {"caution": CAUTION, "readings": readings, "hints": [h.to_json() for h in hints]}
