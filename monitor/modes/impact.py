"""Impact (bump) test: natural frequencies, damping and amplification factors.

:func:`bump_test` takes the frequency response of one or several hits
(:mod:`monitor.modes.frequency_response`), picks the peaks in a band and, for each mode,
gives the peak frequency, the damping ratio by half-power bandwidth, the amplification
factor (API 684 definition ``f_n / (f_2 - f_1)`` and ``1 / (2 zeta)``), the damping ratio
by logarithmic decrement of the band-passed decay and, optionally, an SDOF curve fit with
uncertainty (:mod:`monitor.modes.damping`).

It refuses what is not an impact test. With a force channel each hit is checked
(:mod:`monitor.modes.hits`: no hit, double hit, clipped or overloaded hammer, not an
impact); refused hits are left out of the average, and a record with no usable hit raises
:class:`ImpactRefused`. A peak is reported as a mode only when it stands
:data:`NOISE_MARGIN_DB` above the noise floor of the frequency response and, with two or
more hits, its coherence is at least :data:`MIN_COHERENCE`; the others are listed as
:class:`RejectedPeak`.

Frequencies in Hz; damping ratio ``zeta`` as a fraction of critical damping. The
``frequency_hz`` of an identified mode is the interpolated peak of the response
magnitude; for light damping it lies within ``zeta^2`` (relative) of the undamped natural
frequency. The curve fit gives the undamped natural frequency itself.

References
----------
W. T. Thomson, *Theory of Vibration with Applications*: half-power points and quality
factor; logarithmic decrement (section 2.7).
API Standard 684, *Rotordynamic Tutorial*: amplification factor by the half-power method,
separation margins.
J. S. Bendat and A. G. Piersol, *Random Data*: H1 and coherence (from memory).
D. J. Ewins, *Modal Testing: Theory, Practice and Application*: peak picking; coherence
close to 1 at the resonances of a good measurement (from memory).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
from numpy.typing import ArrayLike
from scipy import signal

from monitor.detection import margins
from monitor.model import validate
from monitor.model.registry import Mode
from monitor.modes.damping import (
    DECAY_BAND_RATIO,
    ModalFit,
    damping_from_decrement,
    decay_decrement,
    fit_sdof,
)
from monitor.modes.frequency_response import FrequencyResponse, frequency_response, hit_records
from monitor.modes.hits import HitCheck, check_hits
from monitor.modes.peaks import half_power_points, parabola_vertex

#: A mode's peak must stand this far above the noise floor, dB (x 10 in magnitude): the
#: noise then moves the peak by at most +-10 % (0.8 dB), and a noise-only bin (Rayleigh
#: distributed about the floor) reaches it with probability exp(-100).
NOISE_MARGIN_DB = 20.0
#: Least coherence over a mode's half-power band, with two or more hits (common practice;
#: a coherence of 0.9 means the response is 90 % explained by the measured force).
MIN_COHERENCE = 0.9


class ImpactRefused(ValueError):
    """Every hit of an impact test was refused; ``checks`` holds what was wrong with each
    (:class:`monitor.modes.hits.HitCheck`, in hit order)."""

    def __init__(self, checks: tuple[HitCheck, ...]) -> None:
        self.checks = checks
        if len(checks) == 1:
            text = checks[0].message()
        else:
            text = f"all {len(checks)} hits were refused: " + "; ".join(
                f"hit {i}: {c.message()}" for i, c in enumerate(checks, 1))
        super().__init__(text + ".")


@dataclass(frozen=True)
class RejectedPeak:
    """A peak of the frequency response not reported as a mode: its frequency (Hz), its
    magnitude (the response's unit), why (``reason``) and one sentence (``message``)."""

    frequency_hz: float
    magnitude: float
    reason: Literal["noise_floor", "coherence"]
    message: str

    def to_json(self) -> dict[str, Any]:
        return {"frequency_hz": self.frequency_hz, "magnitude": self.magnitude,
                "reason": self.reason, "message": self.message}


@dataclass(frozen=True)
class IdentifiedMode:
    """One mode identified from an impact test.

    Attributes
    ----------
    frequency_hz : float
        Peak frequency of the response magnitude, Hz (interpolated).
    magnitude : float
        Peak magnitude, in the frequency response's unit.
    half_power_hz : (float, float) or None
        -3 dB frequencies f1, f2, Hz; None when the peak is not resolved (too close to a
        neighbour or to the band edge).
    damping_ratio_half_power : float or None
        ``(f2 - f1) / (2 f_n)``.
    amplification_factor : float or None
        ``f_n / (f2 - f1)``, the API 684 half-power definition.
    amplification_factor_from_damping : float or None
        ``1 / (2 zeta)`` with zeta from the decrement when there is one, else from the
        half-power bandwidth (the two agree for light damping).
    log_decrement, damping_ratio_decrement : float or None
        Mean over the hits of the logarithmic decrement of the band-passed decay.
    decrement_hits, decrement_cycles : int
        Hits that gave a decrement, and the cycles spanned in the first of them.
    fit : ModalFit or None
    coherence : float or None
        Mean coherence over the half-power band (with a force channel and several hits).
    noise_margin_db : float or None
        How far the peak rises above the higher of its two valleys (its prominence),
        relative to the noise floor at the peak, dB; None for a noise-free record.
    """

    frequency_hz: float
    magnitude: float
    half_power_hz: tuple[float, float] | None = None
    damping_ratio_half_power: float | None = None
    amplification_factor: float | None = None
    amplification_factor_from_damping: float | None = None
    log_decrement: float | None = None
    damping_ratio_decrement: float | None = None
    decrement_hits: int = 0
    decrement_cycles: int = 0
    fit: ModalFit | None = None
    coherence: float | None = None
    noise_margin_db: float | None = None

    @property
    def damping_ratio(self) -> float | None:
        """Best available damping ratio: decrement, else half-power, else curve fit."""
        for z in (self.damping_ratio_decrement, self.damping_ratio_half_power):
            if z is not None:
                return z
        return self.fit.damping_ratio if self.fit is not None else None

    def as_mode(self, name: str, *, source: str = "impact test", date: Any = None) -> Mode:
        """A registry :class:`~monitor.model.registry.Mode` (frequency, damping, AF)."""
        z = self.damping_ratio
        return Mode(
            name=name, frequency_hz=self.frequency_hz,
            damping_ratio=z if z is not None and 0 < z < 1 else None,
            amplification_factor=self.amplification_factor,
            source=source, date=date,
        )

    def required_margin_pct(self) -> tuple[float, float] | None:
        """API 684 required margin (mode below, mode above the excitation), percent, from
        :attr:`amplification_factor` (or ``1 / (2 zeta)`` when the bandwidth is missing)."""
        af = self.amplification_factor or self.amplification_factor_from_damping
        if af is None or af < 1:
            return None
        return (margins.api684_required_margin(af, "below"),
                margins.api684_required_margin(af, "above"))

    def to_json(self) -> dict[str, Any]:
        req = self.required_margin_pct()
        return {
            "frequency_hz": self.frequency_hz,
            "magnitude": self.magnitude,
            "half_power_hz": list(self.half_power_hz) if self.half_power_hz else None,
            "damping_ratio_half_power": self.damping_ratio_half_power,
            "amplification_factor": self.amplification_factor,
            "amplification_factor_from_damping": self.amplification_factor_from_damping,
            "log_decrement": self.log_decrement,
            "damping_ratio_decrement": self.damping_ratio_decrement,
            "decrement_hits": self.decrement_hits,
            "decrement_cycles": self.decrement_cycles,
            "fit": None if self.fit is None else {
                "frequency_hz": self.fit.frequency_hz,
                "frequency_std_hz": self.fit.frequency_std_hz,
                "damping_ratio": self.fit.damping_ratio,
                "damping_ratio_std": self.fit.damping_ratio_std,
                "rms_residual": self.fit.rms_residual,
                "points": self.fit.points,
            },
            "coherence": self.coherence,
            "noise_margin_db": self.noise_margin_db,
            "required_margin_pct": None if req is None else {"below": req[0], "above": req[1]},
        }


@dataclass(frozen=True, eq=False)
class BumpTest:
    """Result of :func:`bump_test`: the frequency response (of the accepted hits), the
    band searched (Hz), the modes found (ascending in frequency), the check of every hit
    on the force channel (in hit order; empty without one) and the peaks not reported."""

    frf: FrequencyResponse
    band_hz: tuple[float, float]
    modes: tuple[IdentifiedMode, ...]
    hits: tuple[HitCheck, ...] = ()
    rejected: tuple[RejectedPeak, ...] = ()


def bump_test(
    response: ArrayLike,
    fs_hz: float,
    *,
    force: ArrayLike | None = None,
    quantity: str = "acceleration",
    unit: str = "m/s^2",
    force_unit: str = "N",
    force_range: float | None = None,
    band_hz: tuple[float, float] | None = None,
    max_modes: int = 6,
    prominence: float = 0.1,
    noise_margin_db: float = NOISE_MARGIN_DB,
    min_coherence: float = MIN_COHERENCE,
    decrement: bool = True,
    curve_fit: bool = True,
    pad_factor: int = 8,
) -> BumpTest:
    """Identify the modes of an impact (bump) test.

    Parameters
    ----------
    response : array_like
        Response record(s) in ``unit``: 1-D for one hit, 2-D (hits x samples) to average.
    fs_hz : float
        Sample rate, Hz.
    force : array_like, optional
        Hammer force record(s), same shape: each hit is checked
        (:func:`monitor.modes.hits.check_hit`), the accepted ones give the H1 estimate and
        the coherence.
    quantity, unit, force_unit : str
        What the response measures and the units (see :func:`frequency_response`).
    force_range : float, optional
        Stated range of the force channel, ``force_unit``: a hit reaching it is refused.
    band_hz : (float, float), optional
        Search band, Hz; default from 2 resolution steps to 0.45 x ``fs_hz``.
    max_modes : int
        At most this many modes (the largest peaks) are returned.
    prominence : float
        A peak must stand out from its surroundings by this fraction of the band's
        largest magnitude (``scipy.signal.find_peaks`` prominence).
    noise_margin_db : float
        A peak must stand this far above the noise floor, dB.
    min_coherence : float
        Least mean coherence over a mode's half-power band (with two or more hits).
    decrement, curve_fit : bool
        Also compute the logarithmic decrement (per hit, then averaged) and the SDOF fit.
    pad_factor : int
        Zero padding of the spectrum (see :func:`frequency_response`).

    Returns
    -------
    BumpTest

    Raises
    ------
    ImpactRefused
        With a force channel, when every hit was refused.

    References
    ----------
    Half-power bandwidth ``zeta = (f2 - f1) / (2 f_n)`` and ``AF = f_n / (f2 - f1)``
    (Thomson; API 684); logarithmic decrement (Thomson, section 2.7); H1 and coherence
    (Bendat and Piersol, from memory).
    """
    fs = validate.sample_rate_hz(fs_hz)
    validate.whole_number(max_modes, "max_modes")
    prom = validate.in_range(prominence, "prominence", 0.0, 1.0)
    margin = 10.0 ** (validate.non_negative(noise_margin_db, "noise_margin_db") / 20.0)
    min_coh = validate.in_range(min_coherence, "min_coherence", 0.0, 1.0, low_open=False,
                               high_open=False)
    y = hit_records(response, "response")
    checks: tuple[HitCheck, ...] = ()
    if force is not None:
        x = hit_records(force, "force")
        checks = check_hits(x, fs, force_range=force_range, unit=force_unit)
        keep = [i for i, c in enumerate(checks) if c.accepted]
        if not keep:
            raise ImpactRefused(checks)
        if x.shape == y.shape:  # else frequency_response names the mismatch
            x, y = x[keep], y[keep]
        force = x
    frf = frequency_response(
        y, fs, force=force, quantity=quantity, unit=unit, force_unit=force_unit,
        pad_factor=pad_factor,
    )
    lo, hi = _search_band(band_hz, frf, fs)
    f, mag, floor = frf.freq_hz, frf.magnitude, frf.noise_floor
    sel = np.flatnonzero((f >= lo) & (f <= hi))
    if sel.size < 5:
        raise ValueError(
            f"band_hz ({lo:g}, {hi:g}) Hz holds fewer than 5 frequency points; widen it."
        )
    i0, i1 = int(sel[0]), int(sel[-1])
    seg = mag[i0 : i1 + 1]
    top = float(seg.max())
    if not top > 0:
        return BumpTest(frf, (lo, hi), (), checks)
    found, props = signal.find_peaks(seg, prominence=prom * top)
    found = found + i0
    # how far each peak rises above the higher of its two valleys, in noise floors
    rise = props["prominences"] / np.maximum(floor[found], np.finfo(float).tiny)
    order = np.argsort(mag[found])[::-1]
    clear = rise[order] >= margin
    rejected = [_below_floor(f[k], mag[k], r, noise_margin_db)
                for k, r in zip(found[order][~clear][: int(max_modes)],
                                rise[order][~clear], strict=False)]
    keep = order[clear][: int(max_modes)]
    keep = keep[np.argsort(found[keep])]
    pk, pk_rise = found[keep], rise[keep]
    # valleys between neighbouring peaks bound each peak's half-power search
    bounds = [i0] + [
        int(a + np.argmin(mag[a : b + 1])) for a, b in zip(pk[:-1], pk[1:], strict=True)
    ] + [i1]
    modes: list[IdentifiedMode] = []
    for j in range(pk.size):
        m = _identify(frf, y, fs, pk, j, (bounds[j], bounds[j + 1]), decrement, curve_fit)
        if floor[pk[j]] > 0:
            m = dataclasses.replace(m, noise_margin_db=20.0 * math.log10(pk_rise[j]))
        if frf.hits >= 2 and m.coherence is not None and m.coherence < min_coh:
            rejected.append(RejectedPeak(
                m.frequency_hz, m.magnitude, "coherence",
                f"the peak at {m.frequency_hz:.3f} Hz has coherence {m.coherence:.3f}, below "
                f"the {min_coh:g} required"))
        else:
            modes.append(m)
    rejected.sort(key=lambda r: r.frequency_hz)
    return BumpTest(frf, (lo, hi), tuple(modes), checks, tuple(rejected))


def _search_band(band_hz: tuple[float, float] | None, frf: FrequencyResponse,
                 fs: float) -> tuple[float, float]:
    """The band searched for peaks, Hz: ``band_hz`` cut at Nyquist, or the default."""
    if band_hz is None:
        return 2.0 * frf.resolution_hz, 0.45 * fs
    lo, hi = validate.ordered_pair(band_hz, "band_hz")
    if lo >= fs / 2:
        raise ValueError(
            f"band_hz {band_hz!r} must start below the Nyquist frequency {fs / 2:g} Hz."
        )
    return lo, min(hi, fs / 2)


def _below_floor(freq_hz: float, magnitude: float, rise: float, margin_db: float) -> RejectedPeak:
    """A peak rising ``rise`` noise floors above its valleys, fewer than required."""
    return RejectedPeak(
        float(freq_hz), float(magnitude), "noise_floor",
        f"the peak at {freq_hz:.3f} Hz rises {20.0 * math.log10(rise):.1f} dB above the noise "
        f"floor, less than the {margin_db:g} dB required")


def _identify(frf: FrequencyResponse, y: np.ndarray, fs: float, pk: np.ndarray, j: int,
              bounds: tuple[int, int], decrement: bool, curve_fit: bool) -> IdentifiedMode:
    """The mode at peak ``pk[j]`` (index into ``frf``), its half-power search bounded by
    the indices ``bounds`` (the valleys to its neighbours); ``y`` the hits used."""
    f, mag = frf.freq_hz, frf.magnitude
    k = int(pk[j])
    # interpolate on the log magnitude: a resonance is near-parabolic there
    fpk, lpk = parabola_vertex(f, np.log(np.maximum(mag, 1e-300)), k)
    peak = math.exp(lpk)
    hp = half_power_points(f, mag, k, lo_index=bounds[0], hi_index=bounds[1],
                           peak_value=peak)
    z_hp = af = None
    coh = None
    if hp is not None:
        bw = hp[1] - hp[0]
        z_hp, af = bw / (2.0 * fpk), fpk / bw
        if frf.coherence is not None:
            inside = (f >= hp[0]) & (f <= hp[1])
            coh = float(np.mean(frf.coherence[inside])) if inside.any() else None
    elif frf.coherence is not None:
        coh = float(frf.coherence[k])
    delta = z_dec = None
    n_dec = cycles = 0
    if decrement:
        # geometric midpoints to the neighbours keep the other modes out
        left = math.sqrt(f[pk[j - 1]] * fpk) if j > 0 else 0.0
        right = math.sqrt(fpk * f[pk[j + 1]]) if j + 1 < pk.size else math.inf
        band = (max(left, fpk / DECAY_BAND_RATIO),
                min(right, fpk * DECAY_BAND_RATIO, 0.45 * fs))
        deltas = []
        for hit in y:
            fit_d = decay_decrement(hit, fs, fpk, band_hz=band) if band[0] < fpk < band[1] else None
            if fit_d is not None:
                deltas.append(fit_d.log_decrement)
                if not cycles:
                    cycles = fit_d.cycles
        if deltas:
            delta = float(np.mean(deltas))
            z_dec = damping_from_decrement(delta)
            n_dec = len(deltas)
    z_for_af = z_dec if z_dec is not None else z_hp
    modal = None
    if curve_fit:
        guess = z_for_af if z_for_af is not None and 0 < z_for_af < 0.5 else 0.02
        fit_band = None
        if hp is not None:
            half = 3.0 * (hp[1] - hp[0])
            fit_band = (max(fpk - half, f[bounds[0]]), min(fpk + half, f[bounds[1]]))
            if fit_band[1] - fit_band[0] < 4 * frf.resolution_hz:
                fit_band = (fpk - 2 * frf.resolution_hz, fpk + 2 * frf.resolution_hz)
        modal = fit_sdof(frf, fpk, band_hz=fit_band, damping_guess=guess)
    return IdentifiedMode(
        frequency_hz=fpk, magnitude=peak, half_power_hz=hp,
        damping_ratio_half_power=z_hp, amplification_factor=af,
        amplification_factor_from_damping=1.0 / (2.0 * z_for_af) if z_for_af else None,
        log_decrement=delta, damping_ratio_decrement=z_dec,
        decrement_hits=n_dec, decrement_cycles=cycles, fit=modal, coherence=coh,
    )
