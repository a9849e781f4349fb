"""Damping of one mode: the logarithmic decrement of its free decay, and a single-degree-
of-freedom curve fit around its peak in a frequency response.

References
----------
W. T. Thomson, *Theory of Vibration with Applications*: logarithmic decrement (section
2.7, Examples 2.7-1 and 2.7-2).
D. J. Ewins, *Modal Testing: Theory, Practice and Application*: SDOF curve fits around a
resonance (from memory).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike
from scipy import optimize, signal

from monitor.model import units, validate
from monitor.modes.frequency_response import FrequencyResponse

#: Default band-pass for the decrement: mode frequency / 1.5 to x 1.5.
DECAY_BAND_RATIO = 1.5
#: Power ``p`` of ``j f / f_n`` in the SDOF response of each measured quantity:
#: displacement 0, velocity 1 (one differentiation), acceleration 2.
_RESPONSE_POWER: dict[units.Quantity, int] = {"displacement": 0, "velocity": 1, "acceleration": 2}


# ----------------------------------------------------------------------------- decrement


def decrement_from_amplitudes(x0: float, xn: float, cycles: int = 1) -> float:
    """Logarithmic decrement ``delta = ln(x0 / xn) / n`` from two peak amplitudes n cycles
    apart (any one unit).

    References
    ----------
    Thomson, Theory of Vibration with Applications, section 2.7, Example 2.7-2.
    """
    a = validate.positive(x0, "x0")
    b = validate.positive(xn, "xn")
    n = validate.whole_number(cycles, "cycles")
    return math.log(a / b) / n


def damping_from_decrement(log_decrement: float) -> float:
    """Damping ratio ``zeta = delta / sqrt(4 pi^2 + delta^2)`` from the logarithmic
    decrement (exact for viscous damping).

    References
    ----------
    Thomson, Theory of Vibration with Applications, section 2.7.
    """
    d = validate.non_negative(log_decrement, "log_decrement")
    return d / math.sqrt(4.0 * math.pi**2 + d * d)


@dataclass(frozen=True, eq=False)
class DecayFit:
    """Logarithmic decrement of one decay.

    ``log_decrement`` (per cycle) is minus the least-squares slope of ln(peak amplitude)
    against cycle number, which equals ``ln(x0 / xn) / n`` for a clean exponential decay;
    ``damping_ratio`` from it; ``cycles`` the number of cycles spanned (n);
    ``damped_frequency_hz`` from the peak spacing; ``peak_times_s`` and
    ``peak_amplitudes`` (the record's unit) the envelope peaks used.
    """

    log_decrement: float
    damping_ratio: float
    cycles: int
    damped_frequency_hz: float
    peak_times_s: np.ndarray
    peak_amplitudes: np.ndarray


def decay_decrement(
    record: ArrayLike,
    fs_hz: float,
    frequency_hz: float,
    *,
    band_hz: tuple[float, float] | None = None,
    floor: float = 0.05,
    filter_band: bool = True,
) -> DecayFit | None:
    """Logarithmic decrement of the free decay of one mode in a record.

    The record is band-passed around the mode (zero-phase 4th-order Butterworth, so the
    other modes drop out), the positive peaks after the largest one are located
    (parabolic interpolation between samples) down to ``floor`` x the first, and a line is
    fitted to their logarithm against cycle number.

    Parameters
    ----------
    record : array_like
        One decay (e.g. the response to one hit), any unit.
    fs_hz : float
        Sample rate, Hz.
    frequency_hz : float
        The mode's frequency, Hz.
    band_hz : (float, float), optional
        Band-pass edges, Hz; default ``frequency_hz`` / 1.5 to 1.5 x ``frequency_hz``
        (narrower bands bias the decrement: the filter eats the resonance's skirts).
    floor : float
        Stop at peaks below this fraction of the first (noise would flatten the decay).
    filter_band : bool
        False uses the record as it is (a single clean mode).

    Returns
    -------
    DecayFit, or None when fewer than 3 usable peaks were found.

    References
    ----------
    Thomson, Theory of Vibration with Applications, section 2.7 (logarithmic decrement).
    """
    x = np.asarray(record, dtype=float)
    if x.ndim != 1 or x.size < 16 or not np.isfinite(x).all():
        raise ValueError(
            f"record must be a finite 1-D array of at least 16 samples, got shape {x.shape}."
        )
    fs = validate.sample_rate_hz(fs_hz)
    fn = validate.frequency_hz(frequency_hz, "frequency_hz", positive=True)
    if fn >= fs / 2:
        raise ValueError(f"frequency_hz must be below fs_hz / 2 = {fs / 2:g} Hz, got {fn!r}.")
    fl = validate.in_range(floor, "floor", 0.0, 1.0)
    lo, hi = (validate.ordered_pair(band_hz, "band_hz") if band_hz is not None
              else (fn / DECAY_BAND_RATIO, fn * DECAY_BAND_RATIO))
    hi = min(hi, 0.45 * fs)
    if filter_band:
        if not lo < fn < hi:
            raise ValueError(f"band_hz {band_hz!r} must contain frequency_hz {fn:g}.")
        sos = signal.butter(4, (max(lo, 1e-6 * fs), hi), btype="bandpass", fs=fs, output="sos")
        # Extend the record backwards by a few periods so the filter sees no step: a
        # mirror image when it starts near a peak (released from a displacement), a
        # point reflection when it starts near zero (at rest, then hit).
        v0_over_w = (x[1] - x[0]) * fs / (2 * math.pi * fn)
        pad: Literal["even", "odd"] = "even" if abs(x[0]) >= abs(v0_over_w) else "odd"
        x = signal.sosfiltfilt(sos, x, padtype=pad, padlen=min(x.size - 1, int(4 * fs / fn)))
    idx, _ = signal.find_peaks(x, distance=max(1, int(0.6 * fs / fn)))
    if idx.size < 3:
        return None
    # the filter rings up for a few cycles around the hit; start after the largest peak
    # and skip the last cycles, where the zero-phase filter's edge transient sits
    start = int(np.argmax(x[idx]))
    edge = int(3 * fs / fn) if filter_band else 0
    idx = idx[start:]
    idx = idx[idx < x.size - 1 - edge]
    if idx.size < 3:
        return None
    t, a = np.empty(idx.size), np.empty(idx.size)
    for j, k in enumerate(idx):
        # vertex of the parabola through three samples: the peak between samples
        y0, y1, y2 = x[k - 1], x[k], x[k + 1]
        den = y0 - 2 * y1 + y2
        d = 0.5 * (y0 - y2) / den if den < 0 else 0.0
        t[j] = (k + d) / fs
        a[j] = y1 - 0.25 * (y0 - y2) * d
    keep = np.flatnonzero(a < fl * a[0])
    stop = int(keep[0]) if keep.size else a.size
    t, a = t[:stop], a[:stop]
    if a.size < 3 or np.any(a <= 0):
        return None
    period = float(np.median(np.diff(t)))
    cyc = np.rint((t - t[0]) / period)
    if np.any(np.diff(cyc) <= 0):
        return None
    slope = float(np.polyfit(cyc, np.log(a), 1)[0])
    delta = -slope
    if not delta > 0:
        return None
    return DecayFit(
        log_decrement=delta,
        damping_ratio=damping_from_decrement(delta),
        cycles=int(cyc[-1]),
        damped_frequency_hz=float(cyc[-1] / (t[-1] - t[0])),
        peak_times_s=t,
        peak_amplitudes=a,
    )


# ----------------------------------------------------------------------------- curve fit


@dataclass(frozen=True)
class ModalFit:
    """SDOF curve fit around one peak.

    ``frequency_hz`` undamped natural frequency (Hz) and ``damping_ratio``, each with its
    standard error (from the Jacobian at the solution and the residual variance);
    ``rms_residual`` relative to the peak magnitude; ``points`` fitted.
    """

    frequency_hz: float
    frequency_std_hz: float
    damping_ratio: float
    damping_ratio_std: float
    rms_residual: float
    points: int


def _sdof_model(p: np.ndarray, f: np.ndarray, power: int, complex_: bool) -> np.ndarray:
    fn, zeta = p[0], p[1]
    r = f / fn
    den = 1.0 - r * r + 2j * zeta * r
    if complex_:
        amp, resid = p[2] + 1j * p[3], p[4] + 1j * p[5]
        return amp * (1j * r) ** power / den + resid
    return abs(p[2]) * r**power / np.abs(den) + p[3]


def fit_sdof(
    frf: FrequencyResponse,
    frequency_hz: float,
    *,
    band_hz: tuple[float, float] | None = None,
    damping_guess: float = 0.02,
) -> ModalFit | None:
    """Least-squares fit of one SDOF mode plus a constant residual around a peak.

    With an H1 estimate the complex response is fitted,
    ``H(f) = A (j f/f_n)^p / (1 - (f/f_n)^2 + 2 j zeta f/f_n) + R`` with ``p`` 0, 1, 2
    for displacement, velocity, acceleration responses; with a response spectrum only its
    magnitude. The residual ``R`` stands for the modes outside the band.

    Parameters
    ----------
    frf : FrequencyResponse
    frequency_hz : float
        Starting frequency, Hz (the peak).
    band_hz : (float, float), optional
        Fitted band, Hz; default the peak +- 3 half-power bandwidths (at least 4
        resolution steps).
    damping_guess : float
        Starting damping ratio.

    Returns
    -------
    ModalFit, or None when the band holds fewer points than parameters or the fit fails.

    References
    ----------
    Ewins, Modal Testing (SDOF curve fitting; from memory); ``scipy.optimize.least_squares``.
    """
    f0 = validate.frequency_hz(frequency_hz, "frequency_hz", positive=True)
    z0 = validate.in_range(damping_guess, "damping_guess", 0.0, 1.0)
    if band_hz is None:
        half = max(3.0 * 2.0 * z0 * f0, 4.0 * frf.resolution_hz)
        lo, hi = f0 - half, f0 + half
    else:
        lo, hi = validate.ordered_pair(band_hz, "band_hz")
    sel = (frf.freq_hz >= max(lo, 1e-12)) & (frf.freq_hz <= hi)
    f = frf.freq_hz[sel]
    complex_ = frf.kind == "H1"
    data = frf.response[sel]
    n_par = 6 if complex_ else 4
    if f.size < n_par + 2:
        return None
    scale = float(np.max(np.abs(data))) or 1.0
    d = data / scale
    power = _RESPONSE_POWER[frf.quantity]
    # at resonance the denominator is 2 j zeta: A ~ H(f_n) 2 j zeta / j^p
    k = int(np.argmin(np.abs(f - f0)))
    if complex_:
        a0 = d[k] * 2j * z0 / (1j) ** power
        p0 = np.array([f0, z0, a0.real, a0.imag, 0.0, 0.0])
    else:
        p0 = np.array([f0, z0, abs(d[k]) * 2 * z0, 0.0])
    lower = np.full(n_par, -np.inf)
    upper = np.full(n_par, np.inf)
    lower[:2] = (f[0], 1e-6)
    upper[:2] = (f[-1], 0.9)
    p0[0] = float(np.clip(p0[0], f[0] * (1 + 1e-9), f[-1] * (1 - 1e-9)))

    def resid(p: np.ndarray) -> np.ndarray:
        e = _sdof_model(p, f, power, complex_) - d
        return np.concatenate([e.real, e.imag]) if complex_ else e

    try:
        res = optimize.least_squares(resid, p0, bounds=(lower, upper), x_scale="jac")
    except (ValueError, np.linalg.LinAlgError):
        return None
    if not res.success:
        return None
    m = res.fun.size
    dof = max(m - n_par, 1)
    s2 = 2.0 * res.cost / dof
    jac = np.asarray(res.jac, dtype=float)  # dense: least_squares was given no sparsity
    jtj = jac.T @ jac
    try:
        cov = np.linalg.pinv(jtj) * s2
    except np.linalg.LinAlgError:
        return None
    std = np.sqrt(np.maximum(np.diag(cov), 0.0))
    return ModalFit(
        frequency_hz=float(res.x[0]),
        frequency_std_hz=float(std[0]),
        damping_ratio=float(res.x[1]),
        damping_ratio_std=float(std[1]),
        rms_residual=float(math.sqrt(2.0 * res.cost / m)),
        points=int(f.size),
    )
