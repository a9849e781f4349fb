"""How long an excitation has stayed in a resonance band: dwelling told from passing through.

A run-up or a coast-down carries every order excitation through the bands of the modes
below the running speed. Passing through a band is a transient: it is recorded as a passage
(:mod:`monitor.modes.passage_tracker`), not alarmed. Staying in a band, at a steady speed or
on a ramp so slow that the excitation spends a while inside, is what builds up the resonant
response and fatigues the structure, so that is what a resonance alarm is about.

A :class:`BandStay` follows one (mode, excitation) pair: for each resonance level
(:mod:`monitor.detection.resonance`: 1 advisory, the approach band; 2 alert, the required
band; 3 severe, the half-power band inside it) the time at which the excitation entered that
level's band and has been inside it ever since. A stay in a level's band begins with the
first speed value at which the level's raise condition holds and lasts while its relaxed
(hysteresis) condition holds, so a speed hovering on a band edge does not restart it. A
level may be raised once its stay has lasted ``dwell_s`` (the ``resonance_dwell_s``
setting); the alarm engine's persistence count comes on top.

Readings taken while the excitation sweeps through a required band (a stay that began with
an entry seen, i.e. after a speed value outside the band, and has lasted less than
``dwell_s``) are left out of amplitude growth: their amplitude is a transient resonant
response, comparable with nothing. A stay that began with the first speed value ever seen
is not known to be a sweep, and its readings are used.

References
----------
ANSI/ISA-18.2-2016, *Management of Alarm Systems for the Process Industries*: alarm on-delay
against nuisance alarms on short excursions (from memory).
W. T. Thomson, *Theory of Vibration with Applications*: the transient of a forced SDOF system
decays with the time constant 1 / (zeta omega_n), so a resonant response builds up over many
cycles near resonance and a fast sweep does not reach it.
"""

from __future__ import annotations

from typing import Any

from monitor.detection.state_json import float_in, float_out

#: The levels a stay follows, by rank (1 advisory, 2 alert, 3 severe).
LEVEL_RANKS = (1, 2, 3)
#: The rank of the required band (alert): the band whose sweeps growth leaves out.
REQUIRED_BAND_RANK = 2


class BandStay:
    """The stays of one (mode, excitation) pair in its resonance bands.

    ``since[rank - 1]`` is the time (epoch s) the excitation entered the band of that level
    and has stayed in since, or None while it is outside; ``crossed`` tells whether the
    current stay in the required band began with an entry seen (the speed value before lay
    outside the band).
    """

    __slots__ = ("since", "crossed")

    def __init__(self) -> None:
        self.since: list[float | None] = [None, None, None]
        self.crossed = False

    def advance(self, ts: float, raise_rank: int, hold_rank: int, entry_seen: bool, dwell_s: float) -> int:
        """Follow one new speed value at ``ts`` (epoch s) at which the pair's margin gives
        ``raise_rank`` and ``hold_rank`` (0 none ... 3 severe, the margin's levels without
        any forecast). ``entry_seen`` tells whether a speed value came before this one (so
        a stay beginning now began with an entry seen).

        Returns the rank the pair may raise: the highest up to ``raise_rank`` whose band
        the excitation has stayed in for ``dwell_s`` seconds, or 0; -1 when it is outside
        every band (the stay may be forgotten)."""
        since = self.since
        for k in LEVEL_RANKS:
            if hold_rank < k:
                since[k - 1] = None
            elif since[k - 1] is None and raise_rank >= k:
                since[k - 1] = ts
                if k == REQUIRED_BAND_RANK:
                    self.crossed = entry_seen
        for k in range(raise_rank, 0, -1):
            start = since[k - 1]
            if start is not None and ts - start >= dwell_s:
                return k
        return 0 if since[0] is not None or since[1] is not None or since[2] is not None else -1

    def sweeping(self, ts: float, dwell_s: float) -> bool:
        """True when, at ``ts`` (epoch s), the excitation is passing through the required
        band: it was seen entering less than ``dwell_s`` seconds ago."""
        start = self.since[REQUIRED_BAND_RANK - 1]
        return start is not None and self.crossed and ts - start < dwell_s

    def seconds_in(self, ts: float) -> float | None:
        """Seconds, at ``ts`` (epoch s), the excitation has stayed in its innermost band
        (None outside every band): a transition's ``dwell_s`` evidence."""
        for start in reversed(self.since):
            if start is not None:
                return ts - start
        return None

    def snapshot(self) -> list[Any]:
        """Exact JSON data: ``[since advisory, since alert, since severe, crossed]``."""
        return [*(float_out(s) for s in self.since), self.crossed]

    @classmethod
    def restore(cls, data: list[Any]) -> BandStay:
        """Rebuild from :meth:`snapshot`."""
        stay = cls()
        stay.since = [float_in(v) for v in data[:3]]
        stay.crossed = bool(data[3])
        return stay
