"""Live resonance passages: the run-ups and coast-downs of a speed history, each with its
1x Bode data and the passages through modes found in it.

:class:`PassageTracker` is fed one reading at a time in time order, ``(ts, speed_hz,
amplitude, phase_deg)``: the reading's time (epoch s), running speed (Hz), 1x amplitude
(peak, any one unit) and 1x phase (degrees of lag after the once-per-revolution pulse) or
None. It splits the speed history into sweeps with :class:`monitor.modes.sweeps.SweepSplitter`
and analyses each completed sweep with :func:`analyse_sweep`. Its state is the
splitter's: plain JSON, bounded (:meth:`PassageTracker.snapshot`).

A passage (:func:`analyse_sweep`) is an amplitude peak of the sweep's 1x curve
(:func:`monitor.modes.runup.find_passages`) that

- has half-power speeds on both sides (so it has an amplification factor and a damping
  ratio: API 684 half-power method, :func:`monitor.modes.peaks.half_power_points`), and
- when the sweep carries phase, whose phase moves by about 90 deg between the two
  half-power speeds (:data:`PHASE_CHANGE_DEG`). A single mode lags its force by
  atan(2 zeta r / (1 - r^2)), which is 45 deg at the lower half-power point and 135 deg
  at the upper one (Thomson, forced SDOF response): a peak without that phase change is
  not a resonance (a beat, a load change, a rub).

Its natural frequency is the critical speed (peak vertex) x the order; for a rotating
unbalance the peak lies within O(zeta^2) of the undamped natural frequency.

References
----------
W. T. Thomson, *Theory of Vibration with Applications*: forced SDOF response, its phase,
rotating unbalance, half-power points.
API Standard 684, *Rotordynamic Tutorial*: amplification factor by the half-power method.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

from monitor.model import validate
from monitor.model.jsonsafe import jsonable
from monitor.model.registry import Machine
from monitor.model.timefmt import iso_utc
from monitor.modes.runup import BodeData, Passage, bode_data, find_passages
from monitor.modes.sweeps import (
    MIN_READINGS,
    SpeedPoint,
    Sweep,
    SweepKind,
    SweepRules,
    SweepSplitter,
)

#: The ``source`` of a mode identified in a run-up or coast-down (a registry mode made
#: from a passage, the evidence of a passage's mode-shift finding).
PASSAGE_SOURCE = "run-up/coast-down"
#: A passage's phase change between its half-power speeds, degrees: 90 for one mode
#: (Thomson); the band allows for a neighbouring mode, a flexible support and the
#: sweep's delay (common practice, no published bound).
PHASE_CHANGE_DEG = (45.0, 135.0)


@dataclass(frozen=True, eq=False)
class SweepPassages:
    """One completed sweep and its passages.

    Attributes
    ----------
    sweep : Sweep
        Its readings (``ts`` epoch s, speed Hz, 1x amplitude and phase).
    bode : BodeData or None
        The 1x amplitude (and phase) against speed of the readings that carry an
        amplitude; None when fewer than :data:`monitor.modes.sweeps.MIN_READINGS` do.
    passages : tuple of Passage
        The accepted passages, ascending in speed.
    method : {'phase', 'half-power'}
        'phase' when every reading with an amplitude carries a phase (a passage must then
        show the phase change too), else 'half-power'.
    rejected : tuple of (Passage, str)
        Peaks that were not accepted, with the reason (one sentence).
    """

    sweep: Sweep
    bode: BodeData | None
    passages: tuple[Passage, ...]
    method: Literal["phase", "half-power"]
    rejected: tuple[tuple[Passage, str], ...] = ()

    @property
    def kind(self) -> SweepKind:
        return self.sweep.kind

    def to_json(self) -> dict[str, Any]:
        """``{"kind", "started_at", "ended_at" (ISO 8601 UTC), "start_speed_hz",
        "end_speed_hz", "rate_hz_s", "readings", "method", "passages": [Passage.to_json()
        + "natural_frequency_hz"], "bode": BodeData.to_json() | null}``."""
        s = self.sweep
        return jsonable({
            "kind": s.kind,
            "started_at": iso_utc(s.started_at, timespec="milliseconds"),
            "ended_at": iso_utc(s.ended_at, timespec="milliseconds"),
            "start_speed_hz": s.start_speed_hz,
            "end_speed_hz": s.end_speed_hz,
            "rate_hz_s": s.rate_hz_s,
            "readings": len(s.points),
            "method": self.method,
            "passages": [p.to_json() | {"natural_frequency_hz": p.frequency_hz}
                         for p in self.passages],
            "bode": None if self.bode is None else self.bode.to_json(),
        })


def analyse_sweep(
    sweep: Sweep, *, prominence: float = 0.3, unit: str = "", order: float = 1.0
) -> SweepPassages:
    """The Bode data and the passages of one sweep (module docstring).

    ``prominence`` as in :func:`monitor.modes.runup.find_passages`; ``unit`` names the
    amplitude's unit; ``order`` the order the amplitudes belong to (1.0 = 1x).
    """
    used = [p for p in sweep.points if p.amplitude is not None]
    with_phase = bool(used) and all(p.phase_deg is not None for p in used)
    method: Literal["phase", "half-power"] = "phase" if with_phase else "half-power"
    if len(used) < MIN_READINGS:
        return SweepPassages(sweep, None, (), method)
    bode = bode_data(
        np.array([p.speed_hz for p in used]),
        np.array([p.amplitude for p in used], dtype=float),
        np.array([p.phase_deg for p in used], dtype=float) if with_phase else None,
        unit=unit,
        order=order,
    )
    accepted, rejected = [], []
    for passage in find_passages(bode, prominence=prominence):
        why = _rejection(passage, with_phase)
        if why is None:
            accepted.append(passage)
        else:
            rejected.append((passage, why))
    return SweepPassages(sweep, bode, tuple(accepted), method, tuple(rejected))


def _rejection(p: Passage, with_phase: bool) -> str | None:
    """Why peak ``p`` is not a passage, or None when it is one."""
    if p.half_power_speeds_hz is None:
        return "the amplitude does not fall to 0.707 of the peak on both sides."
    if with_phase:
        lo, hi = PHASE_CHANGE_DEG
        change = p.phase_change_deg
        if change is None or not lo <= change <= hi:
            moved = "an unknown amount" if change is None else f"{change:.0f} deg"
            return (f"the phase moves by {moved} between the half-power speeds, "
                    f"not {lo:.0f}-{hi:.0f} deg.")
    return None


def stop_speed_hz(machine: Machine) -> float:
    """Half ``machine``'s minimum operating speed, Hz: below it the machine counts as
    stopped for the sweep rules, and its readings are left out (at very low speed the 1x
    of an accelerometer is noise)."""
    return machine.speed_range_rpm[0] / 2.0 / 60.0


class PassageTracker:
    """Sweeps and passages of one measurement point's readings, incrementally.

    Parameters
    ----------
    rules : SweepRules, optional
        What makes a sweep (:mod:`monitor.modes.sweeps`); the defaults otherwise.
    prominence : float
        A passage's peak must stand out by this fraction of the sweep's largest 1x.
    unit : str
        Unit of the amplitudes fed (a label for the Bode data).
    snapshot : dict, optional
        State to carry on from (:meth:`snapshot`).
    """

    def __init__(
        self,
        rules: SweepRules | None = None,
        *,
        prominence: float = 0.3,
        unit: str = "",
        snapshot: dict[str, Any] | None = None,
    ) -> None:
        self.prominence = validate.in_range(prominence, "prominence", 0.0, 1.0)
        self.unit = unit
        self._splitter = (
            SweepSplitter(rules) if snapshot is None else SweepSplitter.from_snapshot(snapshot, rules)
        )

    @property
    def rules(self) -> SweepRules:
        return self._splitter.rules

    @property
    def sweeping(self) -> SweepKind | None:
        """'run-up' or 'coast-down' while the speed is moving through a leg that may
        become a sweep, else None (steady running, stopped)."""
        return self._splitter.sweeping

    def update(
        self, ts: float, speed_hz: float, amplitude: float | None = None,
        phase_deg: float | None = None,
    ) -> tuple[SweepPassages, ...]:
        """Feed one reading (epoch s, Hz, 1x peak amplitude or None for a speed-only
        reading, 1x phase in degrees or None); returns the sweeps it completes, each
        analysed. A reading not newer than the last is ignored. Raises ValueError for a
        non-finite value or a negative speed or amplitude."""
        return self._analysed(self._splitter.update(SpeedPoint(ts, speed_hz, amplitude, phase_deg)))

    def flush(self) -> tuple[SweepPassages, ...]:
        """End of the data (a file's end): close the open leg and analyse it if it is a
        sweep. A live service does not call this: a sweep ends by the rules."""
        return self._analysed(self._splitter.flush())

    def snapshot(self) -> dict[str, Any]:
        """The tracker's state as plain JSON (bounded by ``rules.max_points`` readings)."""
        return self._splitter.snapshot()

    def _analysed(self, sweeps: tuple[Sweep, ...]) -> tuple[SweepPassages, ...]:
        return tuple(analyse_sweep(s, prominence=self.prominence, unit=self.unit) for s in sweeps)
