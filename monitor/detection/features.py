"""The growth features of one reading: the amplitudes detection keeps a baseline and a
trend of (overall level, order amplitudes, speed-normalised 1x, bearing envelope lines).
"""

from __future__ import annotations

import functools
import math
from typing import NamedTuple

from monitor.analysis.waveform import ReadingAnalysis
from monitor.detection.margins import order_label
from monitor.model.registry import Machine


class Feature(NamedTuple):
    """A growth feature: ``name`` ('overall', '1x', '1x_norm', '2x', ..., 'bearing_<defect>'),
    the ``unit`` of its values, and whether it depends on the running speed (then it is
    compared with its baseline only near the baseline's speed)."""

    name: str
    unit: str
    speed_dependent: bool


OVERALL = Feature("overall", "mm/s RMS", True)
ONE_X = Feature("1x", "mm/s peak", True)
ONE_X_NORMALISED = Feature("1x_norm", "mm/s peak per Hz^2", False)


def growth_orders(machine: Machine) -> tuple[tuple[float, Feature], ...]:
    """(order, feature) of the order features other than 1x, in growth's order."""
    return tuple((o, Feature(order_label(o), "mm/s peak", True))
                 for o in sorted({2.0, *(float(x) for x in machine.excitation_orders)} - {1.0}))


@functools.cache
def bearing_feature(defect: str) -> Feature:
    """The feature of a bearing defect's envelope line (its prominence over the floor)."""
    return Feature(f"bearing_{defect}", "line / floor", False)


# An envelope line needs this much prominence over the envelope spectrum's floor before it
# counts as a defect line (common practice: a line well clear of the noise, ~15 dB).
BEARING_NOISE_DB = 15.0


def reading_features(analysis: ReadingAnalysis, machine: Machine,
                     orders: tuple[tuple[float, Feature], ...] | None = None) -> list[tuple[Feature, float]]:
    """The growth features present in ``analysis`` with their values, in growth's order;
    ``orders`` is :func:`growth_orders` of ``machine`` when the caller keeps it."""
    out = [(OVERALL, float(analysis.overall_velocity_mm_s_rms))]
    # Order amplitudes by their order, looked up exactly first (the analysis computes the
    # machine's own orders) and by ReadingAnalysis.order's tolerance otherwise.
    by_order = {o.order: o for o in analysis.orders}
    one = by_order.get(1.0) or analysis.order(1.0)
    if one is not None:
        out.append((ONE_X, float(one.velocity_mm_s)))
    if math.isfinite(analysis.one_x_normalised):
        out.append((ONE_X_NORMALISED, float(analysis.one_x_normalised)))
    for o, feature in (growth_orders(machine) if orders is None else orders):
        oa = by_order.get(o) or analysis.order(o)
        if oa is not None:
            out.append((feature, float(oa.velocity_mm_s)))
    bearing = analysis.extra.get("bearing") if analysis.extra else None
    if bearing:
        # The envelope line over the envelope spectrum's floor (linear), not the line's
        # amplitude: the demodulation band may move between readings, the prominence
        # hardly does (monitor/analysis/bearings.py). A defect shows as this ratio growing
        # against its own baseline.
        # Lines less prominent than BEARING_NOISE_DB are envelope noise: clamping them there
        # keeps a healthy bearing's baseline flat, so only a line that stands out grows.
        for defect, db in bearing.get("indicator_db", {}).items():
            if db is not None and math.isfinite(db):
                prominence = 10.0 ** (max(db, BEARING_NOISE_DB) / 20.0)
                out.append((bearing_feature(defect), prominence))
    return out
