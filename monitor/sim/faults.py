"""Faults the simulator adds: sensor and cabling faults on a finished block, and the slow
growth of unbalance over days.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

from monitor.model import validate

FaultKind = Literal["flat_line", "clipping", "spikes", "dropout"]
_FAULT_KINDS = ("flat_line", "clipping", "spikes", "dropout")


@dataclass(frozen=True)
class SensorFault:
    """A sensor or cabling fault applied to a finished block.

    Attributes
    ----------
    kind : {'flat_line', 'clipping', 'spikes', 'dropout'}
        ``flat_line``: output stuck at ``level`` (sample's unit) from ``start_fraction``
        of the block on; ``clipping``: samples limited to +-``level`` (an amplifier rail);
        ``spikes``: ``count`` isolated samples of +-``level`` added; ``dropout``:
        ``count`` gaps of zeros, each ``gap_fraction`` of the block long.
    level : float
    start_fraction : float
        Where in the block the fault starts, 0-1 (flat line only).
    count : int
    gap_fraction : float
    """

    kind: FaultKind
    level: float = 0.0
    start_fraction: float = 0.0
    count: int = 5
    gap_fraction: float = 0.05


def apply_sensor_fault(
    samples: np.ndarray, fault: SensorFault, seed: int | np.random.SeedSequence | None = 0
) -> np.ndarray:
    """Return a copy of ``samples`` with ``fault`` applied (see :class:`SensorFault`)."""
    if fault.kind not in _FAULT_KINDS:
        raise ValueError(f"fault.kind must be one of {_FAULT_KINDS}, got {fault.kind!r}.")
    x = np.array(samples, dtype=float)
    n = x.size
    rng = np.random.default_rng(seed)
    if fault.kind == "flat_line":
        validate.in_range(fault.start_fraction, "fault.start_fraction", 0.0, 1.0, low_open=False)
        x[int(fault.start_fraction * n) :] = fault.level
    elif fault.kind == "clipping":
        rail = validate.positive(fault.level, "fault.level")
        np.clip(x, -rail, rail, out=x)
    elif fault.kind == "spikes":
        pos = rng.choice(n, size=min(int(fault.count), n), replace=False)
        x[pos] += fault.level * rng.choice((-1.0, 1.0), size=pos.size)
    else:
        width = max(1, int(fault.gap_fraction * n))
        for start in rng.integers(0, max(1, n - width), size=int(fault.count)):
            x[start : start + width] = 0.0
    return x


# ----------------------------------------------------------------------------- slow faults


def grown_unbalance(
    initial_kg_m: float,
    elapsed_days: float,
    *,
    doubling_days: float | None = None,
    rate_kg_m_per_day: float | None = None,
) -> float:
    """Unbalance m*e (kg m) after ``elapsed_days`` of growth from ``initial_kg_m``.

    Give ``doubling_days`` for exponential growth (erosion, build-up feeding on itself)
    or ``rate_kg_m_per_day`` for linear growth; not both.
    """
    validate.non_negative(initial_kg_m, "initial_kg_m")
    if (doubling_days is None) == (rate_kg_m_per_day is None):
        raise ValueError("give exactly one of doubling_days or rate_kg_m_per_day.")
    if doubling_days is not None:
        validate.positive(doubling_days, "doubling_days")
        return initial_kg_m * 2.0 ** (elapsed_days / doubling_days)
    return initial_kg_m + float(rate_kg_m_per_day) * elapsed_days  # type: ignore[arg-type]
