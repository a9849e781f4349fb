"""Drive skip bands: running speeds a variable-speed drive should not dwell in.

:func:`skip_bands` turns modes, excitation orders and the required separation margins
(:mod:`monitor.detection.margins`, API 684) into speed bands (r/min), merged and clipped to
the speed range.

References
----------
API Standard 684, *Rotordynamic Tutorial*: separation margins.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

from monitor.detection import margins
from monitor.model import validate
from monitor.model.registry import Machine, Mode


@dataclass(frozen=True)
class SkipBand:
    """A running-speed band to skip, r/min, and the (mode, excitation) pairs that cause it
    (``'<mode>@<order>x'``)."""

    low_rpm: float
    high_rpm: float
    causes: tuple[str, ...] = field(default_factory=tuple)

    @property
    def low_hz(self) -> float:
        return self.low_rpm / 60.0

    @property
    def high_hz(self) -> float:
        return self.high_rpm / 60.0

    def to_json(self) -> dict[str, Any]:
        return {"low_rpm": self.low_rpm, "high_rpm": self.high_rpm, "causes": list(self.causes)}


def skip_bands(
    modes: Sequence[Mode],
    excitation_orders: Sequence[float],
    speed_range_rpm: tuple[float, float],
    *,
    machine_default_pct: float | None = None,
) -> tuple[SkipBand, ...]:
    """Speed bands (r/min) in which an order excitation violates a mode's required margin.

    For a mode at ``f_m`` with required margins ``m_below`` (mode below the excitation)
    and ``m_above`` (mode above), order ``k`` must keep out of the excitation band
    ``[f_m (1 - m_above/100), f_m (1 + m_below/100)]``, i.e. out of the speeds
    ``60 f / k`` r/min over that band. Bands are merged where they overlap or touch and
    clipped to ``speed_range_rpm``; modes needing no margin (AF < 2.5) add none.
    Fixed-frequency excitations (2x line) do not depend on speed and add none.

    References
    ----------
    API 684 separation margins via :func:`monitor.detection.margins.required_margin`.
    """
    lo_r, hi_r = validate.ordered_pair(speed_range_rpm, "speed_range_rpm", "r/min")
    orders = [validate.positive(o, f"excitation_orders[{i}]")
              for i, o in enumerate(excitation_orders)]
    raw: list[tuple[float, float, str]] = []
    for m in modes:
        fm = validate.frequency_hz(m.frequency_hz, f"mode {m.name!r} frequency_hz", positive=True)
        req = margins.required_margin(m, machine_default_pct)
        if req.below_pct <= 0 and req.above_pct <= 0:
            continue
        f_lo = fm * (1.0 - req.above_pct / 100.0)
        f_hi = fm * (1.0 + req.below_pct / 100.0)
        for o in sorted(set(orders)):
            lo, hi = 60.0 * f_lo / o, 60.0 * f_hi / o
            lo, hi = max(lo, lo_r), min(hi, hi_r)
            if hi > lo:
                raw.append((lo, hi, f"{m.name}@{margins.order_label(o)}"))
    raw.sort()
    merged: list[list[Any]] = []
    for lo, hi, cause in raw:
        if merged and lo <= merged[-1][1]:
            merged[-1][1] = max(merged[-1][1], hi)
            merged[-1][2].append(cause)
        else:
            merged.append([lo, hi, [cause]])
    return tuple(SkipBand(lo, hi, tuple(c)) for lo, hi, c in merged)


def machine_skip_bands(
    machine: Machine, modes: Sequence[Mode] | None = None, *,
    machine_default_pct: float | None = None,
) -> tuple[SkipBand, ...]:
    """:func:`skip_bands` for ``machine``'s excitation orders and speed range, with its
    stored modes or the given ``modes`` (e.g. ones just identified)."""
    return skip_bands(
        machine.modes if modes is None else modes, machine.excitation_orders,
        machine.speed_range_rpm, machine_default_pct=machine_default_pct,
    )
