"""Mode shift: identified natural frequencies against the registry's stored modes.

:func:`mode_shift` and :func:`compare_modes` compare identified frequencies (Hz) with the
stored modes; a move beyond a tolerance (default 5 %, common practice) is a
:class:`ModeShift` finding with ``exceeded=True`` that the detection layer raises as a
``mode_shift`` alarm.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Literal

from monitor.model import validate
from monitor.model.registry import Mode

#: A mode whose identified frequency moved more than this from the stored one, percent of
#: the stored frequency, is reported as shifted (common practice, no published source).
DEFAULT_SHIFT_TOLERANCE_PCT = 5.0
#: An identified frequency is matched to a stored mode only within this distance, percent.
DEFAULT_MATCH_WINDOW_PCT = 30.0


@dataclass(frozen=True)
class ModeShift:
    """Comparison of one stored mode with the frequency identified now.

    Attributes
    ----------
    mode : str
        Stored mode name (the alarm subject).
    stored_hz : float
        Registry frequency, Hz.
    identified_hz : float or None
        Nearest identified frequency within the match window, Hz; None if none.
    shift_pct : float or None
        ``(identified - stored) / stored x 100``, signed, percent.
    tolerance_pct : float
    status : {'unchanged', 'shifted', 'not_found'}
    """

    mode: str
    stored_hz: float
    identified_hz: float | None
    shift_pct: float | None
    tolerance_pct: float
    status: Literal["unchanged", "shifted", "not_found"]
    kind: Literal["mode_shift"] = "mode_shift"

    @property
    def exceeded(self) -> bool:
        """True when the mode moved beyond the tolerance: raise a ``mode_shift`` alarm."""
        return self.status == "shifted"

    def to_json(self) -> dict[str, Any]:
        return {
            "kind": self.kind, "mode": self.mode, "stored_hz": self.stored_hz,
            "identified_hz": self.identified_hz, "shift_pct": self.shift_pct,
            "tolerance_pct": self.tolerance_pct, "status": self.status,
            "exceeded": self.exceeded,
        }


def check_tolerance_pct(tolerance_pct: Any, name: str = "tolerance_pct") -> float:
    """A shift tolerance, percent of the stored frequency, in (0, 100); ValueError naming
    ``name`` (the keyword, or a command's option) otherwise."""
    return validate.in_range(tolerance_pct, name, 0.0, 100.0, unit=" %")


def mode_shift(
    mode: Mode, identified_hz: float, *, tolerance_pct: float = DEFAULT_SHIFT_TOLERANCE_PCT
) -> ModeShift:
    """Shift of ``identified_hz`` (Hz) from the stored ``mode``, percent of the stored
    frequency; ``status='shifted'`` when ``|shift| > tolerance_pct`` (default 5 %,
    common practice)."""
    tol = check_tolerance_pct(tolerance_pct)
    f = validate.frequency_hz(identified_hz, "identified_hz", positive=True)
    stored = float(mode.frequency_hz)
    shift = (f - stored) / stored * 100.0
    return ModeShift(mode.name, stored, f, shift, tol,
                     "shifted" if abs(shift) > tol else "unchanged")


def compare_modes(
    stored: Sequence[Mode],
    identified_hz: Sequence[float],
    *,
    tolerance_pct: float = DEFAULT_SHIFT_TOLERANCE_PCT,
    window_pct: float = DEFAULT_MATCH_WINDOW_PCT,
) -> tuple[ModeShift, ...]:
    """Each stored mode against the nearest identified frequency (Hz) within
    ``window_pct`` percent; one :class:`ModeShift` per stored mode, in registry order.

    An identified frequency serves at most one stored mode (closest pairs first), so two
    stored modes never claim the same peak.
    """
    tol = check_tolerance_pct(tolerance_pct)
    win = validate.positive(window_pct, "window_pct")
    ids = [validate.frequency_hz(v, f"identified_hz[{i}]", positive=True)
           for i, v in enumerate(identified_hz)]
    pairs = sorted(
        (abs(f - m.frequency_hz) / m.frequency_hz, i, j)
        for i, m in enumerate(stored) for j, f in enumerate(ids)
        if abs(f - m.frequency_hz) / m.frequency_hz * 100.0 <= win
    )
    taken_m: dict[int, int] = {}
    taken_f: set[int] = set()
    for _, i, j in pairs:
        if i not in taken_m and j not in taken_f:
            taken_m[i] = j
            taken_f.add(j)
    out = []
    for i, m in enumerate(stored):
        if i in taken_m:
            out.append(mode_shift(m, ids[taken_m[i]], tolerance_pct=tol))
        else:
            out.append(ModeShift(m.name, float(m.frequency_hz), None, None, tol, "not_found"))
    return tuple(out)
