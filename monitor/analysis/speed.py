"""Running speed: estimated from a spectrum (and the raw samples), or from tach pulses.

Estimation runs in three steps:

1. coarse: harmonic summation over candidate speeds inside the machine's speed range
   (amplitude at h x candidate, weighted 1/h so a sub-multiple of the true speed, which
   collects the same peaks at higher harmonic numbers, scores lower);
2. spectral: interpolate each clearly visible harmonic with the exact Hann three-bin
   formula and combine f_h / h weighted by h^2 A_h^2 (their inverse variances);
3. fine (when the samples are given): maximise the least-squares fit of the harmonics
   (real cosine and sine per harmonic) to the record over the fundamental, by parabolic
   steps; the fit is made on the unwindowed DFT bins around each harmonic with the
   model's exact closed-form DFT. This is the maximum-likelihood estimator for harmonics
   in white Gaussian noise and reaches the Cramer-Rao bound above threshold SNR
   (tests/test_speed.py measures it).

The stated uncertainty is the Cramer-Rao bound for the harmonics used, at the SNR read from
the spectrum's noise floor.

References
----------
S. M. Kay, Fundamentals of Statistical Signal Processing: Estimation Theory, 1993,
section 3.7 (CRLB of a sinusoid's frequency; from memory) and chapter 7 (maximum
likelihood; the periodogram maximiser).
A. M. Noll, "Pitch determination of human speech by the harmonic product spectrum, the
harmonic sum spectrum, and a maximum likelihood estimate", 1969 (harmonic summation;
from memory).
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike
from scipy import stats

from monitor.analysis import spectrum as sp
from monitor.analysis.record import Record
from monitor.analysis.spectrum import Spectrum
from monitor.model import validate

#: harmonics must stand this far above the mean noise power per bin to be used (10 dB).
_MIN_HARMONIC_SNR = 10.0
#: the Hann three-bin interpolation without the raw samples wastes information: its RMS
#: error runs at about 2-2.3x the Cramer-Rao standard deviation (tests/test_speed.py
#: measures it over seeded trials), so its stated uncertainty carries this factor.
_SPECTRAL_PATH_LOSS = 2.2


@dataclass(frozen=True)
class SpeedEstimate:
    """Running speed estimated from vibration.

    ``speed_hz`` in Hz (rev/s); ``uncertainty_hz`` one standard deviation, Hz (the
    Cramer-Rao bound at the measured SNR; near-achieved when samples were given);
    ``harmonics`` the harmonic numbers that carried signal.
    """

    speed_hz: float
    uncertainty_hz: float
    source: Literal["estimated"] = "estimated"
    harmonics: tuple[int, ...] = ()


@dataclass(frozen=True)
class TachSpeed:
    """Speed from once-per-revolution pulses.

    ``speed_hz`` (Hz) from a straight-line fit of pulse time against revolution number;
    ``uncertainty_hz`` its standard error (0 when the pulses lie exactly on the line);
    ``reference_s`` the fitted time (s, same clock as the pulses) of the pulse nearest the
    middle of the pulse train: the once-per-revolution phase reference; ``pulses`` count;
    ``missing`` revolutions with no pulse; ``revolution_poly`` the revolutions since the
    first pulse as a polynomial of time (``numpy.polyval`` coefficients, highest power
    first): a parabola (constant angular acceleration) from 4 pulses on, else a line.
    """

    speed_hz: float
    uncertainty_hz: float
    reference_s: float
    pulses: int
    missing: int = 0
    revolution_poly: tuple[float, ...] = ()

    def revolutions_at(self, times_s: ArrayLike) -> np.ndarray:
        """Revolutions turned since the first pulse at ``times_s`` (s, the pulses' clock):
        the shaft angle / 2 pi, from :attr:`revolution_poly`."""
        return np.polyval(np.asarray(self.revolution_poly), np.asarray(times_s, dtype=float))


# ----------------------------------------------------------------------------- helpers


@functools.lru_cache(maxsize=16)
def _median_over_mean(averages: int) -> float:
    """Median / mean of a bin's power in white noise: chi-square with 2 x averages
    degrees of freedom (ln 2 for one segment)."""
    dof = 2 * averages
    return float(stats.chi2.median(dof) / dof)


#: bins either side of a harmonic whose median power gives its local noise floor; the
#: innermost bins (the Hann main lobe and its first neighbours) are left out.
_FLOOR_HALF_WIDTH = 32
_FLOOR_GAP = 3


def local_noise_power(spectrum: Spectrum, bins: np.ndarray) -> np.ndarray:
    """Mean noise power per bin (unit^2, one-sided RMS^2) around each of ``bins``.

    The median power of the bins 4-32 away on either side, divided by the chi-square
    median/mean ratio: robust to the few bins that hold sinusoids, and local, so a
    coloured floor (a velocity spectrum falls as 1/f) is read where the harmonic sits.
    """
    a = spectrum.amplitude
    offs = np.arange(_FLOOR_GAP + 1, _FLOOR_HALF_WIDTH + 1)
    offs = np.concatenate([-offs[::-1], offs])
    idx = np.clip(np.rint(bins).astype(np.intp)[:, None] + offs[None, :], 1, a.size - 2)
    amp = a[idx]
    power = amp * amp / (2.0 if spectrum.scaling == "peak" else 1.0)
    return np.median(power, axis=1) / _median_over_mean(spectrum.averages)


def crlb_frequency_var(eta: float, n: int, fs_hz: float) -> float:
    """Cramer-Rao bound (Hz^2) on the frequency of one real sinusoid in white noise.

    var(f) >= 12 fs^2 / ((2 pi)^2 eta N (N^2 - 1)), eta = A^2 / (2 sigma^2).

    References
    ----------
    Kay 1993, Estimation Theory, section 3.7 (from memory).
    """
    if eta <= 0 or n < 2:
        return math.inf
    return 12.0 * fs_hz * fs_hz / ((2.0 * math.pi) ** 2 * eta * n * (n * n - 1.0))


# ----------------------------------------------------------------------------- estimation


def _coarse(a: np.ndarray, lo_bin: float, hi_bin: float, harmonics: int) -> float:
    """Harmonic-sum maximiser on a grid of 1/(2H) bin; returns the fractional bin."""
    step = 1.0 / (2 * harmonics)
    cand = np.arange(lo_bin, hi_bin + 0.5 * step, step)
    if cand.size == 0:
        cand = np.array([lo_bin])
    last = a.size - 1
    hs = np.arange(1, harmonics + 1, dtype=float)
    pos = np.outer(cand, hs)
    lo_i = np.minimum(pos.astype(np.intp), last)
    hi_i = np.minimum(lo_i + 1, last)
    vals = np.where(pos <= last, np.maximum(a[lo_i], a[hi_i]), 0.0)
    score = vals @ (1.0 / hs)
    return float(cand[int(np.argmax(score))])


def _spectral_refine(
    spectrum: Spectrum, c_bin: float, harmonics: int
) -> tuple[float, np.ndarray, np.ndarray]:
    """Interpolated frequency of each clearly visible harmonic near h x c_bin.

    Returns the combined speed (bins), the harmonic numbers used and their SNR
    eta_h = A_h^2 / (2 sigma_h^2) against the local floor. Used are the harmonics standing
    at least 10 dB above their local mean noise power per bin (1x alone when none does).
    """
    a = spectrum.amplitude
    hs = np.arange(1, harmonics + 1)
    hs = hs[hs * c_bin <= a.size - 3]
    if hs.size == 0:
        return c_bin, np.array([], dtype=int), np.array([])
    centres = hs * c_bin
    i0 = np.maximum(1, np.floor(centres - 1.0).astype(np.intp))
    idx = np.minimum(i0[:, None] + np.arange(4)[None, :], a.size - 2)
    k = idx[np.arange(hs.size), np.argmax(a[idx], axis=1)]
    pos, amp = sp.hann_interpolate(a, k)
    sine_p = amp * amp / (2.0 if spectrum.scaling == "peak" else 1.0)
    noise_p = local_noise_power(spectrum, k)
    strong = sine_p >= _MIN_HARMONIC_SNR * noise_p
    if not strong.any():
        strong = hs == 1
    # E[P_noise] = 2 sigma^2 ENBW_bins / N per bin and P_sine = A^2 / 2 (one-sided), so
    # eta = A^2 / (2 sigma^2) = 2 P_sine ENBW_bins / (N P_noise)
    enbw_bins = spectrum.enbw_hz / spectrum.resolution_hz
    n_seg = spectrum.fft_length
    with np.errstate(divide="ignore"):
        eta = np.where(noise_p > 0, 2.0 * sine_p * enbw_bins / (n_seg * noise_p), np.inf)
    hs, pos, amp, eta = hs[strong], pos[strong], amp[strong], eta[strong]
    wts = hs * hs * amp * amp
    est = pos / hs
    if wts.sum() <= 0:
        return float(est[0]), hs, eta
    return float(np.dot(wts, est) / wts.sum()), hs, eta


#: DFT bins kept either side of each harmonic by the fine step. The kept bins are an
#: orthogonal projection of the record, so noise stays white in them and the fit is
#: exact; a sinusoid keeps all but about 2 / (pi^2 x 32) = 0.6 % of its information.
_FIT_HALF_WIDTH = 32


def _dft_of_exp(theta: np.ndarray, bins: np.ndarray, n: int) -> np.ndarray:
    """DFT at ``bins`` of exp(j theta m), m = 0..n-1: sum_m exp(j (theta - 2 pi k / n) m),
    shape (len(theta), len(bins))."""
    u = theta[:, None] - (2.0 * np.pi / n) * bins[None, :]
    half = 0.5 * u
    den = np.sin(half)
    small = np.abs(den) < 1e-12
    ratio = np.where(small, float(n), np.sin(n * half) / np.where(small, 1.0, den))
    return np.exp(1j * half * (n - 1)) * ratio


def _kept_bins(n: int, centre_bin: float, hs: np.ndarray) -> np.ndarray:
    half = n // 2
    centres = np.rint(hs * centre_bin).astype(np.intp)
    bins = np.unique((centres[:, None] + np.arange(-_FIT_HALF_WIDTH, _FIT_HALF_WIDTH + 1)).ravel())
    # DC is gone with the mean, and Nyquist holds no sinusoid's phase
    return bins[(bins >= 1) & (bins < half)]


def _harmonic_fit(
    record: Record, omegas: np.ndarray, hs: np.ndarray, bins: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Least-squares fit of sum_h a_h cos(h w m) + b_h sin(h w m) at each w in ``omegas``,
    made on the record's DFT bins ``bins`` (each stands for itself and its conjugate
    mirror, hence weight 2).

    Returns the explained energy J(w) (the concentrated log-likelihood for harmonics in
    white Gaussian noise) and the fitted amplitudes sqrt(a_h^2 + b_h^2), shape
    (len(omegas), len(hs)). The model's DFT is exact in closed form, including each
    harmonic's negative-frequency image and its leakage into the other harmonics' bins.
    """
    n = record.samples.size
    y = record.dft[bins]
    nw, nh = omegas.size, hs.size
    theta = np.outer(omegas, hs).ravel()
    dp = _dft_of_exp(theta, bins, n).reshape(nw, nh, bins.size)
    dm = _dft_of_exp(-theta, bins, n).reshape(nw, nh, bins.size)
    model = np.concatenate([0.5 * (dp + dm), -0.5j * (dp - dm)], axis=1)  # cos, sin rows
    # einsum, not BLAS: these products are tiny and BLAS threading costs far more
    conj = np.conj(model)
    gram = 2.0 * np.real(np.einsum("wik,wjk->wij", conj, model))
    rhs = 2.0 * np.real(np.einsum("wik,k->wi", conj, y))
    coef = np.linalg.solve(gram, rhs[..., None])[..., 0]
    energy = np.einsum("wi,wi->w", rhs, coef)
    amps = np.hypot(coef[:, :nh], coef[:, nh:])
    return energy, amps


def _ml_refine(
    record: Record, omega0: float, hs: np.ndarray, iterations: int = 8
) -> tuple[float, np.ndarray]:
    """Maximise the harmonic least-squares energy near ``omega0`` (rad/sample).

    Each step fits a parabola through J at w - e, w, w + e and moves to its vertex, at
    most a quarter bin of the highest harmonic. Returns the maximiser and the fitted
    amplitudes (peak, the samples' unit).
    """
    n = record.samples.size
    bins = _kept_bins(n, omega0 * n / (2.0 * np.pi), hs)
    bin_w = 2.0 * np.pi / n / hs.max()
    # first stencil wide enough to see the curvature from a start 0.1 bin off, then
    # narrow ones: each parabola step cuts the error roughly to its cube
    stencils = (0.05, 0.005, 0.005, 0.005, 0.005, 0.005, 0.005, 0.005)[:iterations]
    w = omega0
    amp = np.zeros((3, hs.size))
    for i, rel in enumerate(stencils):
        eps = rel * bin_w
        j, amp = _harmonic_fit(record, np.array([w - eps, w, w + eps]), hs, bins)
        curv = j[2] - 2.0 * j[1] + j[0]
        if curv < 0:
            step = 0.5 * eps * (j[0] - j[2]) / curv
        else:
            step = math.copysign(0.25 * bin_w, j[2] - j[0])
        step = max(-0.25 * bin_w, min(0.25 * bin_w, step))
        w += step
        # after a concave narrow step the remaining error is far below the
        # Cramer-Rao spread (cubic convergence of parabolic interpolation)
        if i >= 1 and curv < 0 and abs(step) < 0.02 * bin_w:
            break
    return w, amp[1]


def estimate_speed(
    spectrum: Spectrum,
    speed_range_hz: tuple[float, float],
    *,
    harmonics: int = 8,
    samples: ArrayLike | Record | None = None,
    fs_hz: float | None = None,
) -> SpeedEstimate:
    """Estimate running speed (Hz) within ``speed_range_hz`` from vibration.

    Parameters
    ----------
    spectrum : Spectrum
        Amplitude spectrum (any unit; a velocity spectrum usually shows 1x best).
    speed_range_hz : (float, float)
        Lowest and highest possible running speed, Hz.
    harmonics : int
        Harmonics of running speed summed in the coarse search (1-32).
    samples : array_like, optional
        The raw waveform behind the spectrum (any unit); enables the fine
        maximum-likelihood step, which brings the error to the Cramer-Rao bound.
    fs_hz : float, optional
        Sample rate of ``samples``, Hz (required with ``samples``).

    Returns
    -------
    SpeedEstimate
        Speed and its one-sigma uncertainty (Hz).

    Raises
    ------
    ValueError
        The speed range excludes every bin of the spectrum, or an argument is invalid.

    References
    ----------
    Harmonic summation (Noll 1969, from memory); Kay 1993 sections 3.7 and 7 (CRLB,
    periodogram maximiser; from memory).
    """
    spectrum = sp.check_spectrum(spectrum)
    lo, hi = validate.ordered_pair(speed_range_hz, "speed_range_hz", allow_equal=True)
    validate.whole_number(harmonics, "harmonics", minimum=1, maximum=32)
    record = None
    if samples is not None:
        record = Record.of(samples, fs_hz)
        if spectrum.fft_length != record.samples.size or spectrum.averages != 1:
            # the fine step needs a start within a fraction of the record's own bin
            spectrum = sp.amplitude_spectrum(record.samples, record.fs_hz, spectrum.unit)
    df = spectrum.resolution_hz
    last = spectrum.amplitude.size - 1
    nyq = spectrum.freq_hz[-1]
    lo_bin = max(lo / df, 1.0)
    hi_bin = min(hi / df, last - 1.0)
    if lo_bin > hi_bin:
        raise ValueError(
            f"speed_range_hz ({lo:g}, {hi:g}) Hz excludes every bin of the spectrum, "
            f"whose usable bins run from {df:g} to {nyq - df:g} Hz."
        )
    if not np.any(spectrum.amplitude[1:] > 0):
        raise ValueError(
            "samples carry no signal (the spectrum is zero above DC), so the running speed "
            "cannot be estimated from them."
        )
    c_bin = _coarse(spectrum.amplitude, lo_bin, hi_bin, harmonics)
    n_seg = spectrum.fft_length
    fs_seg = df * n_seg
    f_bin, hs_used, etas = _spectral_refine(spectrum, c_bin, harmonics)
    if hs_used.size == 0:
        return SpeedEstimate(speed_hz=c_bin * df, uncertainty_hz=df / math.sqrt(12.0))
    # segments overlap, so averaging K of them carries about K x N samples of information
    n_eff = n_seg * spectrum.averages
    speed = f_bin * df
    loss = _SPECTRAL_PATH_LOSS
    if record is not None:
        n = record.samples.size
        omega0 = 2.0 * np.pi * f_bin / n
        w, _fitted = _ml_refine(record, omega0, hs_used.astype(float))
        # a move of more than half a bin means the fine step left the main lobe
        if abs(w - omega0) <= 0.5 * 2.0 * np.pi / n:
            speed = w * fs_seg / (2.0 * np.pi)
            loss = 1.0
        n_eff = n
    bounds = [crlb_frequency_var(float(e), n_eff, fs_seg) for e in etas]
    if any(b == 0.0 for b in bounds):
        # a noise-free harmonic (eta infinite) pins the frequency exactly
        unc = 0.0
    else:
        inv_var = sum(float(h * h) / b for h, b in zip(hs_used, bounds, strict=True))
        unc = loss * math.sqrt(1.0 / inv_var) if inv_var > 0 else df / math.sqrt(12.0)
    return SpeedEstimate(speed_hz=float(speed), uncertainty_hz=unc,
                         harmonics=tuple(int(h) for h in hs_used))


# ----------------------------------------------------------------------------- tach


def speed_from_tach(pulse_times_s: ArrayLike) -> TachSpeed:
    """Running speed (Hz) and phase reference from once-per-revolution pulse times (s).

    Each interval is counted in revolutions against the median interval (so a missed
    pulse does not halve the speed, and a speed that drifts within the train keeps its
    count), then a least-squares line t = t0 + k T gives speed = 1/T (the mean speed)
    with its standard error.

    Raises
    ------
    ValueError
        Fewer than 2 pulses, non-finite times, or times not strictly increasing.
    """
    t = np.asarray(pulse_times_s, dtype=float)
    if t.ndim != 1 or t.size < 2:
        raise ValueError(
            f"pulse_times_s must hold at least 2 pulse times in seconds, got shape {t.shape}."
        )
    if not np.isfinite(t).all():
        raise ValueError("pulse_times_s must be finite times in seconds; found NaN or inf.")
    dt = np.diff(t)
    if (dt <= 0).any():
        raise ValueError("pulse_times_s must be strictly increasing times in seconds.")
    period0 = float(np.median(dt))
    # interval by interval, so a speed that drifts within the train keeps its count
    steps = np.rint(dt / period0)
    if np.any(steps < 1):
        raise ValueError("pulse_times_s are too irregular to number the revolutions.")
    k = np.concatenate(([0.0], np.cumsum(steps)))
    kc = k - k.mean()
    sxx = float(np.dot(kc, kc))
    period = float(np.dot(kc, t - t.mean()) / sxx)
    t0 = float(t.mean() - period * k.mean())
    resid = t - (t0 + period * k)
    dof = t.size - 2
    se_period = math.sqrt(float(np.dot(resid, resid)) / dof / sxx) if dof > 0 else 0.0
    k_mid = float(np.rint(k.mean()))
    return TachSpeed(
        speed_hz=1.0 / period,
        uncertainty_hz=se_period / (period * period),
        reference_s=t0 + period * k_mid,
        pulses=int(t.size),
        missing=int(k[-1] + 1 - t.size),
        revolution_poly=tuple(float(c) for c in np.polyfit(t, k, 2 if t.size >= 4 else 1)),
    )


def speed_from_pulse_train(once_per_rev_s: ArrayLike) -> TachSpeed | None:
    """Speed and phase reference from a waveform's once-per-revolution pulse times (s), or
    None when they hold fewer than two distinct pulses (no interval, so no speed).

    The times follow the waveform payload's rule (docs/mqtt.md): finite and
    non-decreasing; a repeated time is one pulse (a trigger counted twice).

    Raises
    ------
    ValueError
        Not 1-D, not finite, decreasing, or too irregular to number the revolutions
        (:func:`speed_from_tach`).
    """
    t = np.asarray(once_per_rev_s, dtype=float)
    if t.ndim != 1:
        raise ValueError(f"once_per_rev_s must be a 1-D array of times in seconds, got shape {t.shape}.")
    if not np.isfinite(t).all():
        raise ValueError("once_per_rev_s must be finite times in seconds; found NaN or inf.")
    if (np.diff(t) < 0).any():
        raise ValueError("once_per_rev_s must be non-decreasing times in seconds.")
    distinct = np.unique(t)
    return speed_from_tach(distinct) if distinct.size >= 2 else None
