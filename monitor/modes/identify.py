"""Mode identification: natural frequencies and damping from impact tests and run-ups.

Four jobs, all pure (arrays and dataclasses in, frozen dataclasses out):

1. Impact (bump) test. :func:`frequency_response` estimates the frequency response of one
   or several hits: the H1 estimate ``G_fx / G_ff`` with its coherence when a force
   (hammer) channel exists, otherwise the amplitude spectrum of the decaying ring.
   :func:`bump_test` picks the peaks in a band and, for each mode, gives the peak
   frequency, the damping ratio by half-power bandwidth, the amplification factor (API
   684 definition ``f_n / (f_2 - f_1)`` and ``1 / (2 zeta)``), the damping ratio by
   logarithmic decrement of the band-passed decay (:func:`decay_decrement`) and,
   optionally, an SDOF curve fit with uncertainty (:func:`fit_sdof`).
2. Run-up / coast-down. :func:`bode_data` holds 1x amplitude and phase against speed
   (:func:`order_point` computes one point from a waveform); :func:`find_passages` finds
   the resonance passages: amplitude peak, phase at the peak, amplification factor from
   the half-power speeds (API 684: ``AF = N_c / (N_2 - N_1)``).
3. Mode shift. :func:`mode_shift` and :func:`compare_modes` compare identified
   frequencies with the registry's stored modes; a move beyond a tolerance (default 5 %,
   common practice) is a :class:`ModeShift` finding with ``exceeded=True`` that the
   detection layer can raise as a ``mode_shift`` alarm.
4. Drive skip bands. :func:`skip_bands` turns modes, excitation orders and the required
   separation margins (:mod:`monitor.detection.margins`, API 684) into speed bands (r/min) a
   variable-speed drive should not dwell in, merged and clipped to the speed range.

Conventions
-----------
- Frequencies in Hz, speeds in Hz (rev/s) unless the name says ``rpm`` (r/min).
- Damping ratio ``zeta`` is the fraction of critical damping (dimensionless).
- ``frequency_hz`` of an identified mode is the interpolated peak of the response
  magnitude; for light damping it lies within ``zeta^2`` (relative) of the undamped
  natural frequency. The curve fit gives the undamped natural frequency itself.
- Phase: degrees of lag behind the once-per-revolution reference (the convention of
  :mod:`monitor.analysis.orders`), unwrapped along the speed axis.

References
----------
W. T. Thomson, *Theory of Vibration with Applications*: logarithmic decrement (section
2.7, Examples 2.7-1 and 2.7-2), forced response, half-power points and quality factor.
API Standard 684, *Rotordynamic Tutorial*: amplification factor by the half-power method,
separation margins.
J. S. Bendat and A. G. Piersol, *Random Data*: the H1 frequency response estimate and the
ordinary coherence function (from memory).
D. J. Ewins, *Modal Testing: Theory, Practice and Application*: peak picking, half-power
damping and SDOF circle/curve fits around a resonance (from memory).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
from numpy.typing import ArrayLike
from scipy import fft as sp_fft
from scipy import optimize, signal

from monitor.analysis.orders import order_amplitudes
from monitor.detection import margins
from monitor.model.registry import Machine, Mode

__all__ = [
    "DEFAULT_SHIFT_TOLERANCE_PCT",
    "BodeData",
    "BumpTest",
    "DecayFit",
    "FrequencyResponse",
    "IdentifiedMode",
    "ModalFit",
    "ModeShift",
    "Passage",
    "SkipBand",
    "bode_data",
    "bump_test",
    "compare_modes",
    "damping_from_decrement",
    "decay_decrement",
    "decrement_from_amplitudes",
    "find_passages",
    "fit_sdof",
    "frequency_response",
    "half_power_points",
    "machine_skip_bands",
    "mode_shift",
    "order_point",
    "skip_bands",
]

#: A mode whose identified frequency moved more than this from the stored one, percent of
#: the stored frequency, is reported as shifted (common practice, no published source).
DEFAULT_SHIFT_TOLERANCE_PCT = 5.0
#: An identified frequency is matched to a stored mode only within this distance, percent.
DEFAULT_MATCH_WINDOW_PCT = 30.0
#: Half-power level: amplitude / sqrt(2), i.e. -3.01 dB (API 684: 0.707 x peak).
HALF_POWER = 1.0 / math.sqrt(2.0)
#: Default band-pass for the decrement: mode frequency / 1.5 to x 1.5.
DECAY_BAND_RATIO = 1.5

Quantity = Literal["displacement", "velocity", "acceleration"]
_POWER = {"displacement": 0, "velocity": 1, "acceleration": 2}


# ----------------------------------------------------------------------------- validation


def _finite(value: Any, name: str, *, positive: bool = False, allow_zero: bool = True) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a number, got {value!r}.") from None
    if not math.isfinite(v) or (positive and (v < 0 or (v == 0 and not allow_zero))):
        allowed = "a finite number > 0" if positive and not allow_zero else (
            "a finite number >= 0" if positive else "a finite number")
        raise ValueError(f"{name} must be {allowed}, got {value!r}.")
    return v


def _band(band_hz: Any, name: str = "band_hz") -> tuple[float, float]:
    try:
        lo, hi = (float(v) for v in band_hz)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a pair (low, high) in Hz, got {band_hz!r}.") from None
    if not (math.isfinite(lo) and math.isfinite(hi) and 0 <= lo < hi):
        raise ValueError(f"{name} must satisfy 0 <= low < high (Hz), got {band_hz!r}.")
    return lo, hi


def _hits(records: Any, name: str) -> np.ndarray:
    """One record (1-D) or several equal-length hits (2-D or a list) -> (hits, samples)."""
    try:
        x = np.asarray(records, dtype=float)
    except (TypeError, ValueError):
        raise ValueError(
            f"{name} must be one record or equal-length hits of numbers; got ragged or "
            "non-numeric data."
        ) from None
    if x.ndim == 1:
        x = x[np.newaxis, :]
    if x.ndim != 2 or x.shape[0] < 1 or x.shape[1] < 16:
        raise ValueError(
            f"{name} must hold at least 16 samples per hit (1-D, or 2-D hits x samples), "
            f"got shape {np.shape(records)}."
        )
    if not np.isfinite(x).all():
        raise ValueError(f"{name} must be finite; found NaN or inf.")
    return x


def _quantity(quantity: str) -> Quantity:
    if quantity not in _POWER:
        raise ValueError(f"quantity must be one of {tuple(_POWER)}, got {quantity!r}.")
    return quantity  # type: ignore[return-value]


# ----------------------------------------------------------------------------- FRF


@dataclass(frozen=True, eq=False)
class FrequencyResponse:
    """Frequency response of an impact test.

    Attributes
    ----------
    freq_hz : numpy.ndarray
        Frequencies, Hz (zero-padded grid: spacing ``resolution_hz / pad_factor``).
    response : numpy.ndarray
        ``kind == 'H1'``: complex H1 estimate, response unit per force unit.
        ``kind == 'response spectrum'``: real amplitude spectrum of the ring, response unit
        per hertz (|DFT| / fs; only its shape matters for the modes).
    coherence : numpy.ndarray or None
        Ordinary coherence (0-1) with a force channel; None without. Identically 1 for a
        single hit (one average carries no information about noise).
    kind : {'H1', 'response spectrum'}
    quantity : {'displacement', 'velocity', 'acceleration'}
        What the response channel measures (sets the SDOF model of the curve fit).
    unit : str
        Unit of ``response`` (e.g. ``'m/s^2/N'``).
    hits : int
        Number of averaged hits.
    resolution_hz : float
        Frequency resolution of one hit, 1 / record length, Hz.
    """

    freq_hz: np.ndarray
    response: np.ndarray
    coherence: np.ndarray | None
    kind: Literal["H1", "response spectrum"]
    quantity: Quantity
    unit: str
    hits: int
    resolution_hz: float

    @property
    def magnitude(self) -> np.ndarray:
        """|response|, same unit."""
        return np.abs(self.response)


def frequency_response(
    response: ArrayLike,
    fs_hz: float,
    *,
    force: ArrayLike | None = None,
    quantity: str = "acceleration",
    unit: str = "m/s^2",
    force_unit: str = "N",
    pad_factor: int = 8,
) -> FrequencyResponse:
    """Frequency response of one or several impact-test hits.

    Each hit is one record holding the whole decay; the records are used without a
    window (a transient that has died out needs none, and a window would add damping).

    Parameters
    ----------
    response : array_like
        Response record(s), ``unit``: 1-D (one hit) or 2-D (hits x samples).
    fs_hz : float
        Sample rate, Hz.
    force : array_like, optional
        Force (hammer) record(s), ``force_unit``, same shape as ``response``. Gives the
        H1 estimate and the coherence.
    quantity : {'displacement', 'velocity', 'acceleration'}
        What the response measures.
    unit, force_unit : str
        Units, for the label of the result.
    pad_factor : int
        Zero padding: the spectrum is evaluated on a grid ``pad_factor`` times finer than
        1 / record length, so peaks and -3 dB crossings interpolate well. The resolution
        itself is not improved.

    Returns
    -------
    FrequencyResponse

    References
    ----------
    H1 = G_fx / G_ff averaged over hits, coherence = |G_fx|^2 / (G_ff G_xx) (Bendat and
    Piersol, Random Data; from memory); cross and auto spectra by ``scipy.signal.csd`` and
    ``scipy.signal.welch``.
    """
    fs = _finite(fs_hz, "fs_hz", positive=True, allow_zero=False)
    y = _hits(response, "response")
    q = _quantity(quantity)
    if isinstance(pad_factor, bool) or not isinstance(pad_factor, int | np.integer) or not (
        1 <= pad_factor <= 64
    ):
        raise ValueError(f"pad_factor must be an integer from 1 to 64, got {pad_factor!r}.")
    n = y.shape[1]
    nfft = sp_fft.next_fast_len(int(pad_factor) * n)
    opts: dict[str, Any] = dict(
        fs=fs, window="boxcar", nperseg=n, noverlap=0, nfft=nfft, detrend=False, axis=-1
    )
    if force is None:
        f, pyy = signal.welch(y, scaling="spectrum", **opts)
        # back from power to |DFT| / fs (a density of the transient's Fourier transform)
        mag = np.sqrt(np.mean(pyy, axis=0) * n * n / 2.0) / fs
        return FrequencyResponse(
            f, mag, None, "response spectrum", q, unit, y.shape[0], fs / n
        )
    x = _hits(force, "force")
    if x.shape != y.shape:
        raise ValueError(
            f"force must have the same shape as response {y.shape}, got {x.shape}."
        )
    f, pxy = signal.csd(x, y, scaling="spectrum", **opts)
    _, pxx = signal.welch(x, scaling="spectrum", **opts)
    _, pyy = signal.welch(y, scaling="spectrum", **opts)
    gxy, gxx, gyy = pxy.mean(axis=0), pxx.mean(axis=0), pyy.mean(axis=0)
    tiny = np.finfo(float).tiny
    h1 = gxy / np.maximum(gxx, tiny)
    coh = np.abs(gxy) ** 2 / np.maximum(gxx * gyy, tiny)
    return FrequencyResponse(
        f, h1, np.clip(coh, 0.0, 1.0), "H1", q, f"{unit}/{force_unit}", y.shape[0], fs / n
    )


# ----------------------------------------------------------------------------- half power


def half_power_points(
    freq_hz: ArrayLike, magnitude: ArrayLike, peak_index: int, *,
    lo_index: int | None = None, hi_index: int | None = None, peak_value: float | None = None,
) -> tuple[float, float] | None:
    """Frequencies (Hz) where ``magnitude`` falls to peak / sqrt(2) either side of a peak.

    Walks out from ``peak_index`` (not past ``lo_index`` / ``hi_index``, e.g. the valleys
    to the neighbouring modes) and interpolates linearly between the two samples that
    straddle the -3 dB level. Returns None when either side does not fall that far.

    References
    ----------
    Thomson, half-power points and bandwidth; API 684 (0.707 x peak amplitude).
    """
    f = np.asarray(freq_hz, dtype=float)
    m = np.asarray(magnitude, dtype=float)
    if f.shape != m.shape or f.ndim != 1:
        raise ValueError(
            f"freq_hz and magnitude must be 1-D arrays of one length, got {f.shape} and {m.shape}."
        )
    k = int(peak_index)
    if not 0 <= k < m.size:
        raise ValueError(f"peak_index must lie in [0, {m.size}), got {peak_index!r}.")
    lo = 0 if lo_index is None else max(0, int(lo_index))
    hi = m.size - 1 if hi_index is None else min(m.size - 1, int(hi_index))
    level = (m[k] if peak_value is None else float(peak_value)) * HALF_POWER
    f1 = f2 = None
    i = k
    while i > lo and m[i - 1] >= level:
        i -= 1
    if i > lo:  # m[i-1] < level <= m[i]
        a, b = i - 1, i
        f1 = f[a] + (level - m[a]) / (m[b] - m[a]) * (f[b] - f[a])
    j = k
    while j < hi and m[j + 1] >= level:
        j += 1
    if j < hi:  # m[j] >= level > m[j+1]
        a, b = j, j + 1
        f2 = f[a] + (m[a] - level) / (m[a] - m[b]) * (f[b] - f[a])
    if f1 is None or f2 is None or not f2 > f1:
        return None
    return float(f1), float(f2)


def _vertex(x: np.ndarray, y: np.ndarray, k: int) -> tuple[float, float]:
    """Vertex (x, y) of the parabola through points k-1, k, k+1 (any spacing)."""
    if k <= 0 or k >= y.size - 1:
        return float(x[k]), float(y[k])
    xs, ys = x[k - 1 : k + 2], y[k - 1 : k + 2]
    c2, c1, c0 = np.polyfit(xs - xs[1], ys, 2)
    if c2 >= 0:
        return float(x[k]), float(y[k])
    dx = float(np.clip(-c1 / (2.0 * c2), xs[0] - xs[1], xs[2] - xs[1]))
    return float(xs[1] + dx), float(c0 + c1 * dx + c2 * dx * dx)


# ----------------------------------------------------------------------------- decrement


def decrement_from_amplitudes(x0: float, xn: float, cycles: int = 1) -> float:
    """Logarithmic decrement ``delta = ln(x0 / xn) / n`` from two peak amplitudes n cycles
    apart (any one unit).

    References
    ----------
    Thomson, Theory of Vibration with Applications, section 2.7, Example 2.7-2.
    """
    a = _finite(x0, "x0", positive=True, allow_zero=False)
    b = _finite(xn, "xn", positive=True, allow_zero=False)
    if isinstance(cycles, bool) or not isinstance(cycles, int | np.integer) or cycles < 1:
        raise ValueError(f"cycles must be a whole number >= 1, got {cycles!r}.")
    return math.log(a / b) / int(cycles)


def damping_from_decrement(log_decrement: float) -> float:
    """Damping ratio ``zeta = delta / sqrt(4 pi^2 + delta^2)`` from the logarithmic
    decrement (exact for viscous damping).

    References
    ----------
    Thomson, Theory of Vibration with Applications, section 2.7.
    """
    d = _finite(log_decrement, "log_decrement", positive=True)
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
    fs = _finite(fs_hz, "fs_hz", positive=True, allow_zero=False)
    fn = _finite(frequency_hz, "frequency_hz", positive=True, allow_zero=False)
    if fn >= fs / 2:
        raise ValueError(f"frequency_hz must be below fs_hz / 2 = {fs / 2:g} Hz, got {fn!r}.")
    fl = _finite(floor, "floor", positive=True, allow_zero=False)
    if fl >= 1:
        raise ValueError(f"floor must lie in (0, 1), got {floor!r}.")
    lo, hi = _band(band_hz) if band_hz is not None else (fn / DECAY_BAND_RATIO, fn * DECAY_BAND_RATIO)
    hi = min(hi, 0.45 * fs)
    if filter_band:
        if not lo < fn < hi:
            raise ValueError(f"band_hz {band_hz!r} must contain frequency_hz {fn:g}.")
        sos = signal.butter(4, (max(lo, 1e-6 * fs), hi), btype="bandpass", fs=fs, output="sos")
        # Extend the record backwards by a few periods so the filter sees no step: a
        # mirror image when it starts near a peak (released from a displacement), a
        # point reflection when it starts near zero (at rest, then hit).
        v0_over_w = (x[1] - x[0]) * fs / (2 * math.pi * fn)
        pad = "even" if abs(x[0]) >= abs(v0_over_w) else "odd"
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
    f0 = _finite(frequency_hz, "frequency_hz", positive=True, allow_zero=False)
    z0 = _finite(damping_guess, "damping_guess", positive=True, allow_zero=False)
    if not z0 < 1:
        raise ValueError(f"damping_guess must lie in (0, 1), got {damping_guess!r}.")
    if band_hz is None:
        half = max(3.0 * 2.0 * z0 * f0, 4.0 * frf.resolution_hz)
        lo, hi = f0 - half, f0 + half
    else:
        lo, hi = _band(band_hz)
    sel = (frf.freq_hz >= max(lo, 1e-12)) & (frf.freq_hz <= hi)
    f = frf.freq_hz[sel]
    complex_ = frf.kind == "H1"
    data = frf.response[sel]
    n_par = 6 if complex_ else 4
    if f.size < n_par + 2:
        return None
    scale = float(np.max(np.abs(data))) or 1.0
    d = data / scale
    power = _POWER[frf.quantity]
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
    jtj = res.jac.T @ res.jac
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


# ----------------------------------------------------------------------------- bump test


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
            "required_margin_pct": None if req is None else {"below": req[0], "above": req[1]},
        }


@dataclass(frozen=True, eq=False)
class BumpTest:
    """Result of :func:`bump_test`: the frequency response, the band searched (Hz) and the
    modes found, ascending in frequency."""

    frf: FrequencyResponse
    band_hz: tuple[float, float]
    modes: tuple[IdentifiedMode, ...]


def bump_test(
    response: ArrayLike,
    fs_hz: float,
    *,
    force: ArrayLike | None = None,
    quantity: str = "acceleration",
    unit: str = "m/s^2",
    force_unit: str = "N",
    band_hz: tuple[float, float] | None = None,
    max_modes: int = 6,
    prominence: float = 0.1,
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
        Hammer force record(s), same shape: H1 estimate and coherence.
    quantity, unit, force_unit : str
        What the response measures and the units (see :func:`frequency_response`).
    band_hz : (float, float), optional
        Search band, Hz; default from 2 resolution steps to 0.45 x ``fs_hz``.
    max_modes : int
        At most this many modes (the largest peaks) are returned.
    prominence : float
        A peak must stand out from its surroundings by this fraction of the band's
        largest magnitude (``scipy.signal.find_peaks`` prominence).
    decrement, curve_fit : bool
        Also compute the logarithmic decrement (per hit, then averaged) and the SDOF fit.
    pad_factor : int
        Zero padding of the spectrum (see :func:`frequency_response`).

    Returns
    -------
    BumpTest

    References
    ----------
    Half-power bandwidth ``zeta = (f2 - f1) / (2 f_n)`` and ``AF = f_n / (f2 - f1)``
    (Thomson; API 684); logarithmic decrement (Thomson, section 2.7); H1 and coherence
    (Bendat and Piersol, from memory).
    """
    frf = frequency_response(
        response, fs_hz, force=force, quantity=quantity, unit=unit, force_unit=force_unit,
        pad_factor=pad_factor,
    )
    fs = float(fs_hz)
    if isinstance(max_modes, bool) or not isinstance(max_modes, int | np.integer) or max_modes < 1:
        raise ValueError(f"max_modes must be a whole number >= 1, got {max_modes!r}.")
    prom = _finite(prominence, "prominence", positive=True, allow_zero=False)
    if prom >= 1:
        raise ValueError(f"prominence must lie in (0, 1), got {prominence!r}.")
    if band_hz is None:
        lo, hi = 2.0 * frf.resolution_hz, 0.45 * fs
    else:
        lo, hi = _band(band_hz)
        if lo >= fs / 2:
            raise ValueError(
                f"band_hz {band_hz!r} must start below the Nyquist frequency {fs / 2:g} Hz."
            )
        hi = min(hi, fs / 2)
    f, mag = frf.freq_hz, frf.magnitude
    sel = np.flatnonzero((f >= lo) & (f <= hi))
    if sel.size < 5:
        raise ValueError(
            f"band_hz ({lo:g}, {hi:g}) Hz holds fewer than 5 frequency points; widen it."
        )
    i0, i1 = int(sel[0]), int(sel[-1])
    seg = mag[i0 : i1 + 1]
    top = float(seg.max())
    if not top > 0:
        return BumpTest(frf, (lo, hi), ())
    pk, props = signal.find_peaks(seg, prominence=prom * top)
    if pk.size == 0:
        return BumpTest(frf, (lo, hi), ())
    order = np.argsort(seg[pk])[::-1][: int(max_modes)]
    pk = np.sort(pk[order]) + i0
    # valleys between neighbouring peaks bound each peak's half-power search
    bounds = [i0] + [
        int(a + np.argmin(mag[a : b + 1])) for a, b in zip(pk[:-1], pk[1:], strict=True)
    ] + [i1]
    y = _hits(response, "response")
    modes: list[IdentifiedMode] = []
    for j, k in enumerate(pk):
        # interpolate on the log magnitude: a resonance is near-parabolic there
        fpk, lpk = _vertex(f, np.log(np.maximum(mag, 1e-300)), int(k))
        peak = math.exp(lpk)
        hp = half_power_points(f, mag, int(k), lo_index=bounds[j], hi_index=bounds[j + 1],
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
                fit_band = (max(fpk - half, f[bounds[j]]), min(fpk + half, f[bounds[j + 1]]))
                if fit_band[1] - fit_band[0] < 4 * frf.resolution_hz:
                    fit_band = (fpk - 2 * frf.resolution_hz, fpk + 2 * frf.resolution_hz)
            modal = fit_sdof(frf, fpk, band_hz=fit_band, damping_guess=guess)
        modes.append(
            IdentifiedMode(
                frequency_hz=fpk, magnitude=peak, half_power_hz=hp,
                damping_ratio_half_power=z_hp, amplification_factor=af,
                amplification_factor_from_damping=(
                    1.0 / (2.0 * z_for_af) if z_for_af else None),
                log_decrement=delta, damping_ratio_decrement=z_dec,
                decrement_hits=n_dec, decrement_cycles=cycles, fit=modal, coherence=coh,
            )
        )
    return BumpTest(frf, (lo, hi), tuple(modes))


# ----------------------------------------------------------------------------- run-up


@dataclass(frozen=True, eq=False)
class BodeData:
    """Order amplitude and phase against running speed (a Bode plot's data).

    ``speed_hz`` (Hz) in the order recorded; ``amplitude`` peak in ``unit``; ``phase_deg``
    lag behind the once-per-revolution reference, degrees, unwrapped, or None without a
    reference; ``order`` (1.0 = 1x).
    """

    speed_hz: np.ndarray
    amplitude: np.ndarray
    phase_deg: np.ndarray | None
    unit: str = ""
    order: float = 1.0

    @property
    def speed_rpm(self) -> np.ndarray:
        return self.speed_hz * 60.0

    @property
    def direction(self) -> Literal["run-up", "coast-down"]:
        """'run-up' when speed rises from first to last point, else 'coast-down'."""
        return "run-up" if self.speed_hz[-1] >= self.speed_hz[0] else "coast-down"

    def to_json(self) -> dict[str, Any]:
        """``{"order", "unit", "direction", "speed_hz": [...], "speed_rpm": [...],
        "amplitude": [...], "phase_deg": [...] | null}``."""
        return {
            "order": self.order,
            "unit": self.unit,
            "direction": self.direction,
            "speed_hz": self.speed_hz.tolist(),
            "speed_rpm": self.speed_rpm.tolist(),
            "amplitude": self.amplitude.tolist(),
            "phase_deg": None if self.phase_deg is None else self.phase_deg.tolist(),
        }


def bode_data(
    speed_hz: ArrayLike,
    amplitude: ArrayLike,
    phase_deg: ArrayLike | None = None,
    *,
    unit: str = "",
    order: float = 1.0,
) -> BodeData:
    """Validated :class:`BodeData` from speed (Hz), amplitude (peak, ``unit``) and phase
    (degrees, any wrapping; unwrapped here along the recorded order)."""
    s = np.asarray(speed_hz, dtype=float)
    a = np.asarray(amplitude, dtype=float)
    if s.ndim != 1 or s.shape != a.shape or s.size < 5:
        raise ValueError(
            f"speed_hz and amplitude must be 1-D of one length >= 5, got {s.shape} and {a.shape}."
        )
    if not (np.isfinite(s).all() and (s >= 0).all()):
        raise ValueError("speed_hz must be finite and >= 0 everywhere.")
    if not (np.isfinite(a).all() and (a >= 0).all()):
        raise ValueError("amplitude must be finite and >= 0 everywhere.")
    p = None
    if phase_deg is not None:
        p = np.asarray(phase_deg, dtype=float)
        if p.shape != s.shape or not np.isfinite(p).all():
            raise ValueError(
                f"phase_deg must be finite with the shape of speed_hz {s.shape}, got {p.shape}."
            )
        p = np.unwrap(p, period=360.0)
    o = _finite(order, "order", positive=True, allow_zero=False)
    return BodeData(s, a, p, unit, o)


def order_point(
    samples: ArrayLike,
    fs_hz: float,
    unit: str,
    speed_hz: float,
    *,
    reference_s: float | None = None,
    order: float = 1.0,
) -> tuple[float, float | None]:
    """Amplitude (peak, ``unit``) and phase (degrees, or None without ``reference_s``) of
    one order in one waveform, by :func:`monitor.analysis.orders.order_amplitudes`."""
    oa = order_amplitudes(samples, fs_hz, unit, speed_hz, (order,), reference_s=reference_s)
    if not oa:
        raise ValueError(
            f"order {order:g} x speed_hz {speed_hz:g} Hz is at or above the Nyquist frequency."
        )
    return oa[0].amplitude, oa[0].phase_deg


@dataclass(frozen=True)
class Passage:
    """One resonance passage in a run-up or coast-down.

    Attributes
    ----------
    critical_speed_hz : float
        Speed of the amplitude peak, Hz (parabola through the three highest points).
    peak_amplitude : float
        In the Bode data's unit.
    half_power_speeds_hz : (float, float) or None
        N1, N2: speeds where the amplitude is 0.707 x peak, Hz.
    amplification_factor : float or None
        API 684: ``N_c / (N2 - N1)``.
    damping_ratio : float or None
        ``1 / (2 AF)`` (light damping).
    phase_at_peak_deg : float or None
        Phase at the critical speed, degrees (unwrapped; 90 deg + the phase far below the
        resonance for a single mode).
    phase_change_deg : float or None
        Phase change from N1 to N2 (about 90 deg through a single mode), degrees.
    direction : {'run-up', 'coast-down'}
    order : float
    """

    critical_speed_hz: float
    peak_amplitude: float
    half_power_speeds_hz: tuple[float, float] | None
    amplification_factor: float | None
    damping_ratio: float | None
    phase_at_peak_deg: float | None
    phase_change_deg: float | None
    direction: Literal["run-up", "coast-down"]
    order: float = 1.0

    @property
    def critical_speed_rpm(self) -> float:
        return self.critical_speed_hz * 60.0

    @property
    def frequency_hz(self) -> float:
        """The mode's frequency, Hz: critical speed x order."""
        return self.critical_speed_hz * self.order

    def as_mode(self, name: str, *, date: Any = None) -> Mode:
        return Mode(
            name=name, frequency_hz=self.frequency_hz,
            damping_ratio=self.damping_ratio if self.damping_ratio and self.damping_ratio < 1
            else None,
            amplification_factor=self.amplification_factor,
            source=self.direction, date=date,
        )

    def to_json(self) -> dict[str, Any]:
        return {
            "critical_speed_hz": self.critical_speed_hz,
            "critical_speed_rpm": self.critical_speed_rpm,
            "frequency_hz": self.frequency_hz,
            "peak_amplitude": self.peak_amplitude,
            "half_power_speeds_hz": (
                list(self.half_power_speeds_hz) if self.half_power_speeds_hz else None),
            "amplification_factor": self.amplification_factor,
            "damping_ratio": self.damping_ratio,
            "phase_at_peak_deg": self.phase_at_peak_deg,
            "phase_change_deg": self.phase_change_deg,
            "direction": self.direction,
            "order": self.order,
        }


def find_passages(
    bode: BodeData, *, prominence: float = 0.3, max_passages: int = 4
) -> tuple[Passage, ...]:
    """Resonance passages in a run-up or coast-down.

    The points are sorted by speed; a passage is an amplitude peak that stands out by
    ``prominence`` x the largest amplitude. For each: the critical speed (parabolic
    vertex), the half-power speeds N1, N2 (linear interpolation, not past the valleys to
    neighbouring peaks), AF by API 684, and the phase at the peak and its change from N1
    to N2 when phases exist.

    References
    ----------
    API 684: amplification factor ``N_c / (N2 - N1)`` with N1, N2 at 0.707 x peak.
    Thomson: the response lags the force by 90 deg at resonance.
    """
    if not isinstance(bode, BodeData):
        raise ValueError(f"bode must be a BodeData, got {type(bode).__name__}.")
    prom = _finite(prominence, "prominence", positive=True, allow_zero=False)
    if prom >= 1:
        raise ValueError(f"prominence must lie in (0, 1), got {prominence!r}.")
    if isinstance(max_passages, bool) or not isinstance(max_passages, int) or max_passages < 1:
        raise ValueError(f"max_passages must be a whole number >= 1, got {max_passages!r}.")
    srt = np.argsort(bode.speed_hz, kind="stable")
    s, a = bode.speed_hz[srt], bode.amplitude[srt]
    ph = None if bode.phase_deg is None else bode.phase_deg[srt]
    top = float(a.max())
    if not top > 0:
        return ()
    pk, _ = signal.find_peaks(np.concatenate([[0.0], a, [0.0]]), prominence=prom * top)
    pk = pk - 1
    if pk.size == 0:
        return ()
    pk = np.sort(pk[np.argsort(a[pk])[::-1][:max_passages]])
    bounds = [0] + [int(p + np.argmin(a[p : q + 1])) for p, q in zip(pk[:-1], pk[1:], strict=True)]
    bounds.append(a.size - 1)
    out = []
    for j, k in enumerate(pk):
        nc, peak = _vertex(s, a, int(k))
        hp = half_power_points(s, a, int(k), lo_index=bounds[j], hi_index=bounds[j + 1],
                               peak_value=peak)
        af = zeta = None
        if hp is not None:
            af = nc / (hp[1] - hp[0])
            zeta = 1.0 / (2.0 * af)
        p_peak = p_change = None
        if ph is not None:
            p_peak = float(np.interp(nc, s, ph))
            if hp is not None:
                p_change = float(abs(np.interp(hp[1], s, ph) - np.interp(hp[0], s, ph)))
        out.append(Passage(nc, peak, hp, af, zeta, p_peak, p_change, bode.direction, bode.order))
    return tuple(out)


# ----------------------------------------------------------------------------- mode shift


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


def _tolerance(tolerance_pct: Any) -> float:
    t = _finite(tolerance_pct, "tolerance_pct", positive=True, allow_zero=False)
    if t >= 100:
        raise ValueError(f"tolerance_pct must lie in (0, 100), got {tolerance_pct!r}.")
    return t


def mode_shift(
    mode: Mode, identified_hz: float, *, tolerance_pct: float = DEFAULT_SHIFT_TOLERANCE_PCT
) -> ModeShift:
    """Shift of ``identified_hz`` (Hz) from the stored ``mode``, percent of the stored
    frequency; ``status='shifted'`` when ``|shift| > tolerance_pct`` (default 5 %,
    common practice)."""
    tol = _tolerance(tolerance_pct)
    f = _finite(identified_hz, "identified_hz", positive=True, allow_zero=False)
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
    tol = _tolerance(tolerance_pct)
    win = _finite(window_pct, "window_pct", positive=True, allow_zero=False)
    ids = [_finite(v, f"identified_hz[{i}]", positive=True, allow_zero=False)
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


# ----------------------------------------------------------------------------- skip bands


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
    try:
        lo_r, hi_r = (float(v) for v in speed_range_rpm)
    except (TypeError, ValueError):
        raise ValueError(
            f"speed_range_rpm must be a pair (low, high) in r/min, got {speed_range_rpm!r}."
        ) from None
    if not (math.isfinite(lo_r) and math.isfinite(hi_r) and 0 <= lo_r < hi_r):
        raise ValueError(
            f"speed_range_rpm must satisfy 0 <= low < high (r/min), got {speed_range_rpm!r}."
        )
    orders = [_finite(o, f"excitation_orders[{i}]", positive=True, allow_zero=False)
              for i, o in enumerate(excitation_orders)]
    raw: list[tuple[float, float, str]] = []
    for m in modes:
        fm = _finite(m.frequency_hz, f"mode {m.name!r} frequency_hz", positive=True,
                     allow_zero=False)
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
