"""Rolling-element bearing geometry and its defect frequencies.

One set of formulas for the whole code: the registry checks a machine's bearing keys
with it, the envelope analysis (:mod:`monitor.analysis.bearings`) reads the defect
frequencies from it, and the simulator's scenarios place their defects with it.

References
----------
R. B. Randall and J. Antoni, "Rolling element bearing diagnostics: a tutorial",
Mechanical Systems and Signal Processing 25 (2011) 485-520, section 2: FTF = fr/2 (1 -
d/D cos a), BPFO = n fr/2 (1 - d/D cos a), BPFI = n fr/2 (1 + d/D cos a), BSF = D fr/(2d)
(1 - (d/D)^2 cos^2 a); outer race stationary, inner race turning with the shaft.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

from monitor.model import validate

__all__ = ["DEFECTS", "SETTINGS_KEYS", "BearingGeometry", "DefectFrequencies"]

#: Defect names, in the order they are reported.
DEFECTS = ("bpfo", "bpfi", "bsf", "ftf")

#: Machine ``settings`` keys that carry the bearing geometry (docs/registry.md).
SETTINGS_KEYS = (
    "bearing_elements",
    "bearing_ball_diameter_mm",
    "bearing_pitch_diameter_mm",
    "bearing_contact_angle_deg",
)


@dataclass(frozen=True)
class DefectFrequencies:
    """The four defect frequencies, as orders of shaft speed or in Hz (``unit``).

    ``ftf`` cage (fundamental train), ``bpfo`` ball pass outer race, ``bpfi`` ball pass
    inner race, ``bsf`` ball (roller) spin frequency.
    """

    ftf: float
    bpfo: float
    bpfi: float
    bsf: float
    unit: Literal["order", "Hz"]

    def as_dict(self) -> dict[str, float]:
        """``{"bpfo": ..., "bpfi": ..., "bsf": ..., "ftf": ...}``."""
        return {name: float(getattr(self, name)) for name in DEFECTS}


def _is_integral(v: object) -> bool:
    """A whole number, including a float with no fraction (TOML and JSON may write 9.0)."""
    if isinstance(v, bool):
        return False
    if isinstance(v, int | np.integer):
        return True
    return isinstance(v, float | np.floating) and math.isfinite(v) and float(v).is_integer()


@dataclass(frozen=True)
class BearingGeometry:
    """Geometry of a rolling-element bearing; defect frequencies as multiples of shaft
    speed (orders) or in Hz.

    Attributes
    ----------
    n_elements : int
        Number of rolling elements n, at least 3.
    ball_diameter : float
        Rolling-element diameter d (mm in the registry; any one length unit here).
    pitch_diameter : float
        Pitch diameter D, same unit; 0 < d < D.
    contact_angle_deg : float
        Contact angle alpha, degrees, 0 <= alpha < 90 (0 for deep groove ball bearings).

    References
    ----------
    Randall and Antoni (2011), section 2 (the formulas in the module docstring).
    """

    n_elements: int
    ball_diameter: float
    pitch_diameter: float
    contact_angle_deg: float = 0.0

    def __post_init__(self) -> None:
        if not _is_integral(self.n_elements) or int(self.n_elements) < 3:
            raise ValueError(
                f"n_elements must be an integer of at least 3, got {self.n_elements!r}."
            )
        a = self.contact_angle_deg
        ok = isinstance(a, int | float | np.integer | np.floating) and not isinstance(a, bool)
        if not ok or not 0.0 <= float(a) < 90.0:
            raise ValueError(
                f"contact_angle_deg must be a number from 0 up to (not including) 90, got {a!r}."
            )
        validate.positive(self.ball_diameter, "ball_diameter")
        validate.positive(self.pitch_diameter, "pitch_diameter")
        if not self.ball_diameter < self.pitch_diameter:
            raise ValueError(
                f"ball_diameter must be below pitch_diameter, got {self.ball_diameter!r} "
                f">= {self.pitch_diameter!r}."
            )

    @classmethod
    def from_settings(cls, settings: Mapping[str, Any]) -> BearingGeometry | None:
        """Geometry from a machine's registry ``settings``, or None when it has none.

        Keys (docs/registry.md): ``bearing_elements`` (integer >= 3),
        ``bearing_ball_diameter_mm`` (d > 0), ``bearing_pitch_diameter_mm`` (D > d),
        ``bearing_contact_angle_deg`` (0 <= alpha < 90, default 0). None when none of
        the keys is present; ValueError naming the key when one is missing or wrong.
        """
        if not isinstance(settings, Mapping):
            raise ValueError(f"settings must be a mapping, got {type(settings).__name__}.")
        if not any(k in settings for k in SETTINGS_KEYS):
            return None
        for key in SETTINGS_KEYS[:3]:
            if key not in settings:
                raise ValueError(
                    f"{key} is missing; a bearing needs bearing_elements, "
                    "bearing_ball_diameter_mm and bearing_pitch_diameter_mm together."
                )
        n = settings["bearing_elements"]
        if not _is_integral(n) or int(n) < 3:
            raise ValueError(f"bearing_elements must be an integer of at least 3, got {n!r}.")
        d = validate.finite(settings["bearing_ball_diameter_mm"], "bearing_ball_diameter_mm")
        big_d = validate.finite(settings["bearing_pitch_diameter_mm"], "bearing_pitch_diameter_mm")
        alpha = validate.finite(settings.get("bearing_contact_angle_deg", 0.0),
                                "bearing_contact_angle_deg")
        if not d > 0:
            raise ValueError(f"bearing_ball_diameter_mm must be above 0 mm, got {d!r}.")
        if not big_d > d:
            raise ValueError(
                f"bearing_pitch_diameter_mm must exceed bearing_ball_diameter_mm ({d!r} mm), "
                f"got {big_d!r}."
            )
        if not 0.0 <= alpha < 90.0:
            raise ValueError(
                f"bearing_contact_angle_deg must be from 0 up to (not including) 90, "
                f"got {alpha!r}."
            )
        return cls(int(n), d, big_d, alpha)

    @property
    def _ratio(self) -> float:
        return self.ball_diameter / self.pitch_diameter * math.cos(
            math.radians(self.contact_angle_deg)
        )

    @property
    def ftf_order(self) -> float:
        """Cage (fundamental train) frequency / shaft speed."""
        return 0.5 * (1.0 - self._ratio)

    @property
    def bpfo_order(self) -> float:
        """Ball pass frequency, outer race / shaft speed."""
        return 0.5 * self.n_elements * (1.0 - self._ratio)

    @property
    def bpfi_order(self) -> float:
        """Ball pass frequency, inner race / shaft speed."""
        return 0.5 * self.n_elements * (1.0 + self._ratio)

    @property
    def bsf_order(self) -> float:
        """Ball (roller) spin frequency / shaft speed."""
        return self.pitch_diameter / (2.0 * self.ball_diameter) * (1.0 - self._ratio**2)

    def orders(self) -> DefectFrequencies:
        """Defect frequencies as multiples of shaft speed (orders)."""
        return DefectFrequencies(
            ftf=self.ftf_order,
            bpfo=self.bpfo_order,
            bpfi=self.bpfi_order,
            bsf=self.bsf_order,
            unit="order",
        )

    def frequencies_hz(self, shaft_hz: float) -> DefectFrequencies:
        """Defect frequencies in Hz at shaft speed ``shaft_hz`` (Hz, rev/s)."""
        fr = validate.frequency_hz(shaft_hz, "shaft_hz", positive=True)
        o = self.orders()
        return DefectFrequencies(
            ftf=o.ftf * fr, bpfo=o.bpfo * fr, bpfi=o.bpfi * fr, bsf=o.bsf * fr, unit="Hz"
        )
