"""Machine registry: machines, measurement points and modes, as plain frozen dataclasses.

A plant's set-up is kept as a TOML file under version control (read and written by
:mod:`monitor.model.registry_file`, layout in docs/registry.md) and, for the service, in
the database (``monitor.store``). Every door checks an entry against the bounds of
:mod:`monitor.model.bounds`; every validation error is a :class:`RegistryError` (a
``ValueError``) whose message names the machine, the field and what was expected, in one
sentence.
"""

from __future__ import annotations

import datetime as _dt
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

DIRECTIONS = ("horizontal", "vertical", "axial", "radial")
MACHINE_CLASSES = ("group1/rigid", "group1/flexible", "group2/rigid", "group2/flexible")


class RegistryError(ValueError):
    """A machine registry entry is invalid; the message names the entry and field."""


@dataclass(frozen=True)
class Mode:
    """A natural frequency of the machine and its support.

    Attributes
    ----------
    name : str
        What moves, e.g. "pedestal rocking".
    frequency_hz : float
        Natural frequency, Hz.
    damping_ratio : float or None
        Fraction of critical damping, 0 < zeta < 1.
    amplification_factor : float or None
        Peak response over static response (half-power definition), dimensionless.
    required_margin_pct : float or None
        Separation margin required, percent of the mode frequency; overrides the rule.
    source : str
        How it was found ("impact test", "run-up", "design calculation", ...).
    date : datetime.date or None
        When it was found.
    """

    name: str
    frequency_hz: float
    damping_ratio: float | None = None
    amplification_factor: float | None = None
    required_margin_pct: float | None = None
    source: str = ""
    date: _dt.date | None = None


@dataclass(frozen=True)
class Point:
    """A measurement point: one sensor on one machine.

    ``fs_hz`` is the expected sample rate (Hz); ``unit`` the sensor's native unit.
    ``limits_mm_s`` optionally overrides the machine's zone boundaries for this point
    (A/B, B/C, C/D in mm/s RMS).
    """

    id: str
    direction: str = "horizontal"
    quantity: str = "acceleration"
    unit: str = "m/s^2"
    fs_hz: float | None = None
    limits_mm_s: tuple[float, float, float] | None = None


@dataclass(frozen=True)
class Machine:
    """A monitored machine.

    ``speed_range_rpm`` is the operating speed range (r/min); ``excitation_orders`` the
    orders of running speed that excite the structure (1, 2, blade count, ...);
    ``line_frequency_hz`` (motors) adds 2x line frequency as an excitation;
    ``limits_mm_s`` overrides the class's zone boundaries (A/B, B/C, C/D, mm/s RMS).
    ``settings`` keeps any further keys of the registry file (documented in docs).
    """

    id: str
    name: str = ""
    location: str = ""
    machine_class: str = "group2/rigid"
    speed_range_rpm: tuple[float, float] = (600.0, 3600.0)
    excitation_orders: tuple[float, ...] = (1.0, 2.0)
    line_frequency_hz: float | None = None
    points: tuple[Point, ...] = ()
    modes: tuple[Mode, ...] = ()
    limits_mm_s: tuple[float, float, float] | None = None
    settings: Mapping[str, Any] = field(default_factory=dict)

    @property
    def speed_range_hz(self) -> tuple[float, float]:
        """Operating speed range in Hz (revolutions per second)."""
        return (self.speed_range_rpm[0] / 60.0, self.speed_range_rpm[1] / 60.0)

    def point(self, point_id: str) -> Point:
        """Return the measurement point ``point_id``; KeyError if the machine has none."""
        for p in self.points:
            if p.id == point_id:
                return p
        raise KeyError(f"machine {self.id!r} has no measurement point {point_id!r}")


@dataclass(frozen=True)
class Registry:
    """All machines of a plant, by id."""

    machines: tuple[Machine, ...] = ()

    def machine(self, machine_id: str) -> Machine:
        for m in self.machines:
            if m.id == machine_id:
                return m
        raise KeyError(f"no machine {machine_id!r} in the registry")

    def by_id(self) -> dict[str, Machine]:
        return {m.id: m for m in self.machines}
