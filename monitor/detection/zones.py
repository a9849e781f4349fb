"""Vibration severity zones A/B/C/D of ISO 20816-3 from broadband velocity (mm/s RMS).

Zone boundaries by machine class (group and foundation), overridable per machine
(``machine.limits_mm_s``) or per measurement point (``point.limits_mm_s``; the point wins).

Boundary rule (the standard does not say which zone a value exactly on a boundary belongs
to): a zone includes its UPPER boundary. A value equal to the A/B boundary is zone A, equal
to B/C is zone B, equal to C/D is zone C; anything above C/D is zone D.

Zone meaning (ISO 20816-3, from memory): A newly commissioned machines; B acceptable for
unrestricted long-term operation; C normally not acceptable for long-term operation,
limited time until remedial action; D severe enough to cause damage.

References
----------
ISO 10816-3:2009 / ISO 20816-3:2022, Annex A, Tables A.1 (group 1) and A.2 (group 2);
values from memory: a site must review them against the machine
manufacturer's limits.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

from monitor.model.bounds import check_zone_limits

Zone = Literal["A", "B", "C", "D"]
ZONES: tuple[Zone, ...] = ("A", "B", "C", "D")

#: (A/B, B/C, C/D) boundaries in mm/s RMS, ISO 10816-3:2009 Table A.1/A.2, from memory.
CLASS_LIMITS_MM_S: dict[str, tuple[float, float, float]] = {
    "group1/rigid": (2.3, 4.5, 7.1),
    "group1/flexible": (3.5, 7.1, 11.0),
    "group2/rigid": (1.4, 2.8, 4.5),
    "group2/flexible": (2.3, 4.5, 7.1),
}

#: The boundaries at the top of zones A, B and C.
BOUNDARY_NAMES = ("A/B", "B/C", "C/D")


@dataclass(frozen=True)
class ZoneLimits:
    """Zone boundaries A/B, B/C, C/D in mm/s RMS and where they come from (``source``:
    the class name, 'machine' or 'point')."""

    ab: float
    bc: float
    cd: float
    source: str = ""

    def __post_init__(self) -> None:
        check_zone_limits((self.ab, self.bc, self.cd), "limits_mm_s")

    def as_tuple(self) -> tuple[float, float, float]:
        return (self.ab, self.bc, self.cd)


def zone_limits(
    machine_class: str,
    machine_limits: Sequence[float] | None = None,
    point_limits: Sequence[float] | None = None,
) -> ZoneLimits:
    """Zone boundaries for a point: the point's override, else the machine's, else the
    class default of ISO 20816-3 Annex A (mm/s RMS)."""
    if machine_class not in CLASS_LIMITS_MM_S:
        raise ValueError(
            f"class must be one of {tuple(CLASS_LIMITS_MM_S)}, got {machine_class!r}."
        )
    if point_limits is not None:
        return ZoneLimits(*check_zone_limits(point_limits, "point limits_mm_s"), source="point")
    if machine_limits is not None:
        return ZoneLimits(*check_zone_limits(machine_limits, "machine limits_mm_s"), source="machine")
    return ZoneLimits(*CLASS_LIMITS_MM_S[machine_class], source=machine_class)


def zone_of(velocity_mm_s_rms: float, limits: ZoneLimits) -> Zone:
    """Zone of a broadband velocity (mm/s RMS); a zone includes its upper boundary."""
    v = float(velocity_mm_s_rms)
    if not (math.isfinite(v) and v >= 0):
        raise ValueError(f"velocity_mm_s_rms must be finite and >= 0, got {velocity_mm_s_rms!r}.")
    if v <= limits.ab:
        return "A"
    if v <= limits.bc:
        return "B"
    if v <= limits.cd:
        return "C"
    return "D"


def next_boundary(velocity_mm_s_rms: float, limits: ZoneLimits) -> tuple[str, float] | None:
    """The next boundary above the value: ``('B/C', 4.5)`` ..., or None in zone D (the
    boundary at the top of the value's zone, which includes it)."""
    return boundary_above(zone_of(velocity_mm_s_rms, limits), limits)


def boundary_above(zone: Zone, limits: ZoneLimits) -> tuple[str, float] | None:
    """The boundary at the top of ``zone``, name and mm/s RMS: ``('A/B', limits.ab)`` for
    zone A ..., None for zone D."""
    if zone == "D":
        return None
    i = ZONES.index(zone)
    return BOUNDARY_NAMES[i], limits.as_tuple()[i]


def first_boundary_above(level_mm_s: float, limits: ZoneLimits) -> tuple[str, float] | None:
    """The first boundary (name, mm/s RMS) that ``level_mm_s`` has not reached (lies
    strictly below), or None at or above C/D. For a trend's fitted level, which may lie
    anywhere (even below zero); a measured value's next boundary is
    :func:`next_boundary`."""
    for name, boundary in zip(BOUNDARY_NAMES, limits.as_tuple(), strict=True):
        if level_mm_s < boundary:
            return name, boundary
    return None
