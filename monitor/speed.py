"""Running speed: estimated from a spectrum (and the raw samples), or from tach pulses.

Estimation runs in three steps:

1. coarse: harmonic summation over candidate speeds inside the machine's speed range
   (amplitude at h x candidate, weighted 1/h so a sub-multiple of the true speed, which
   collects the same peaks at higher harmonic numbers, scores lower);
2. spectral: interpolate each clearly visible harmonic with the exact Hann three-bin
   formula and combine f_h / h weighted by h^2 A_h^2 (their inverse variances);
3. fine (when the samples are given): maximise the harmonic periodogram
   sum_h |X(h f)|^2 of the unwindowed record by Newton steps on its exact DTFT, the
   approximate maximum-likelihood estimator for harmonics in white noise, which reaches
   the Cramer-Rao bound at moderate SNR.

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

from monitor import spectrum as sp
from monitor.spectrum import Spectrum

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
    ``missing`` revolutions with no pulse.
    """

    speed_hz: float
    uncertainty_hz: float
    reference_s: float
    pulses: int
    missing: int = 0


# ----------------------------------------------------------------------------- helpers


def _check_range(speed_range_hz: object) -> tuple[float, float]:
    try:
        lo, hi = (float(v) for v in speed_range_hz)  # type: ignore[union-attr]
    except (TypeError, ValueError):
        raise ValueError(
            f"speed_range_hz must be two frequencies (low, high) in Hz, got {speed_range_hz!r}."
        ) from None
    if not (math.isfinite(lo) and math.isfinite(hi) and 0 <= lo <= hi):
        raise ValueError(
            f"speed_range_hz must satisfy 0 <= low <= high (finite, Hz), got {speed_range_hz!r}."
        )
    return lo, hi


@functools.lru_cache(maxsize=16)
def _median_over_mean(averages: int) -> float:
    """Median / mean of a bin's power in white noise: chi-square with 2 x averages
    degrees of freedom (ln 2 for one segment)."""
    dof = 2 * averages
    return float(stats.chi2.median(dof) / dof)


def noise_variance(spectrum: Spectrum) -> float:
    """Per-sample variance (unit^2) of white noise that explains the spectrum's floor.

    The median bin power over the chi-square median/mean ratio gives the mean noise power
    per bin, robust to the few bins that hold sinusoids; E[P] = 2 sigma^2 ENBW_bins / N for
    a one-sided spectrum of N-sample segments.
    """
    power = sp._power(spectrum)[1:]
    # a strided subset keeps the median cheap on long records without biasing it
    stride = max(1, power.size // 4096)
    mean_p = float(np.median(power[::stride])) / _median_over_mean(spectrum.averages)
    enbw_bins = spectrum.enbw_hz / spectrum.resolution_hz
    return mean_p * sp._seg_len(spectrum) / (2.0 * enbw_bins)


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
    score = np.zeros(cand.size)
    for h in range(1, harmonics + 1):
        pos = cand * h
        inside = pos <= last
        lo_i = np.minimum(np.floor(pos).astype(np.intp), last)
        hi_i = np.minimum(lo_i + 1, last)
        score += np.where(inside, np.maximum(a[lo_i], a[hi_i]), 0.0) / h
    return float(cand[int(np.argmax(score))])


def _spectral_refine(
    spectrum: Spectrum, c_bin: float, harmonics: int, noise_p: float
) -> tuple[float, list[tuple[int, float, float]]]:
    """Interpolated frequency of each clearly visible harmonic near h x c_bin.

    Returns the combined speed (bins) and [(h, f_h in bins, amplitude)] for the harmonics
    that stand at least 10 dB above the mean noise power per bin.
    """
    a = spectrum.amplitude
    peak2 = 2.0 if spectrum.scaling == "peak" else 1.0
    found: list[tuple[int, float, float]] = []
    for h in range(1, harmonics + 1):
        centre = h * c_bin
        if centre > a.size - 3:
            break
        i0 = max(1, int(math.floor(centre - 1.0)))
        i1 = min(a.size - 2, int(math.ceil(centre + 1.0)))
        k = i0 + int(np.argmax(a[i0 : i1 + 1]))
        pos, amp = sp._hann_interpolate(a, np.array([k]))
        if (amp[0] ** 2 / peak2) >= _MIN_HARMONIC_SNR * noise_p or h == 1:
            found.append((h, float(pos[0]), float(amp[0])))
    strong = [t for t in found if t[2] ** 2 / peak2 >= _MIN_HARMONIC_SNR * noise_p]
    use = strong or found[:1]
    if not use:
        return c_bin, []
    wts = np.array([h * h * amp * amp for h, _, amp in use])
    est = np.array([f / h for h, f, _ in use])
    if wts.sum() <= 0:
        return float(est[0]), use
    return float(np.dot(wts, est) / wts.sum()), use


def _dirichlet(u: np.ndarray, n: int) -> np.ndarray:
    """sum over t = n' - (n - 1)/2, n' = 0..n-1, of cos(u t) = sin(n u / 2) / sin(u / 2)."""
    half = 0.5 * u
    den = np.sin(half)
    small = np.abs(den) < 1e-12
    return np.where(small, float(n), np.sin(n * half) / np.where(small, 1.0, den))


def _harmonic_fit(
    record: sp.Record, omegas: np.ndarray, hs: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Least-squares fit of sum_h a_h cos(h w t) + b_h sin(h w t) at each w in ``omegas``.

    Returns the explained energy J(w) = c' Gc^-1 c + s' Gs^-1 s (the concentrated
    log-likelihood for harmonics in white Gaussian noise) and the fitted amplitudes
    sqrt(a_h^2 + b_h^2), shape (len(omegas), len(hs)). With time centred on the record
    the cosine and sine columns are orthogonal and the Gram blocks are Dirichlet sums,
    so the fit is exact, including each harmonic's negative-frequency image.
    """
    n = record.samples.size
    hw = np.outer(omegas, hs)  # (W, H)
    x_c = record.dtft(hw.ravel() * (record.fs_hz / (2.0 * np.pi))).reshape(hw.shape)
    x_c = x_c * np.exp(1j * hw * 0.5 * (n - 1))  # time origin at the record centre
    c, s = x_c.real, -x_c.imag
    dm = _dirichlet((hs[:, None] - hs[None, :]) * omegas[:, None, None], n)
    dp = _dirichlet((hs[:, None] + hs[None, :]) * omegas[:, None, None], n)
    gc, gs = 0.5 * (dm + dp), 0.5 * (dm - dp)
    a = np.linalg.solve(gc, c[..., None])[..., 0]
    b = np.linalg.solve(gs, s[..., None])[..., 0]
    energy = np.sum(a * c, axis=1) + np.sum(b * s, axis=1)
    return energy, np.hypot(a, b)


def _ml_refine(
    record: sp.Record, omega0: float, hs: np.ndarray, iterations: int = 8
) -> tuple[float, np.ndarray]:
    """Maximise the harmonic least-squares energy near ``omega0`` (rad/sample).

    Each step fits a parabola through J at w - e, w, w + e (e = 0.005 bin of the highest
    harmonic) and moves to its vertex, at most a quarter of that harmonic's bin. Returns
    the maximiser and the fitted amplitudes (peak, the samples' unit).
    """
    n = record.samples.size
    bin_w = 2.0 * np.pi / n / hs.max()
    eps = 0.005 * bin_w
    w = omega0
    for _ in range(iterations):
        j, amp = _harmonic_fit(record, np.array([w - eps, w, w + eps]), hs)
        curv = j[2] - 2.0 * j[1] + j[0]
        if curv < 0:
            step = 0.5 * eps * (j[0] - j[2]) / curv
        else:
            step = math.copysign(0.25 * bin_w, j[2] - j[0])
        step = max(-0.25 * bin_w, min(0.25 * bin_w, step))
        w += step
        # near the vertex Newton steps shrink quadratically: once a step is this small
        # the remaining error is far below the Cramer-Rao spread
        if abs(step) < 1e-4 * bin_w:
            break
    return w, amp[1]


def estimate_speed(
    spectrum: Spectrum,
    speed_range_hz: tuple[float, float],
    *,
    harmonics: int = 8,
    samples: ArrayLike | sp.Record | None = None,
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
    spectrum = sp._check_spectrum(spectrum)
    lo, hi = _check_range(speed_range_hz)
    if isinstance(harmonics, bool) or not isinstance(harmonics, int) or not 1 <= harmonics <= 32:
        raise ValueError(f"harmonics must be an integer from 1 to 32, got {harmonics!r}.")
    record = None
    if samples is not None:
        record = sp.Record.of(samples, fs_hz)
        if sp._seg_len(spectrum) != record.samples.size or spectrum.averages != 1:
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
    c_bin = _coarse(spectrum.amplitude, lo_bin, hi_bin, harmonics)
    n_seg = sp._seg_len(spectrum)
    fs_seg = df * n_seg
    sigma2 = noise_variance(spectrum)
    enbw_bins = spectrum.enbw_hz / df
    noise_p = 2.0 * sigma2 * enbw_bins / n_seg
    f_bin, used = _spectral_refine(spectrum, c_bin, harmonics, noise_p)
    if not used:
        return SpeedEstimate(speed_hz=c_bin * df, uncertainty_hz=df / math.sqrt(12.0))
    hs_used = tuple(h for h, _, _ in used)
    amps = np.array([amp for _, _, amp in used])
    if spectrum.scaling == "rms":
        amps = amps * math.sqrt(2.0)
    n_eff = n_seg * spectrum.averages
    speed = f_bin * df
    if record is not None:
        n = record.samples.size
        hs = np.array(hs_used, dtype=float)
        omega0 = 2.0 * np.pi * f_bin / n
        w, fitted = _ml_refine(record, omega0, hs)
        # a move of more than half a bin means the fine step left the main lobe
        if abs(w - omega0) <= 0.5 * 2.0 * np.pi / n:
            speed = w * fs_seg / (2.0 * np.pi)
            amps = fitted
        n_eff = n
    etas = amps**2 / (2.0 * sigma2) if sigma2 > 0 else np.full(amps.size, np.inf)
    inv_var = sum(
        h * h / crlb_frequency_var(float(e), n_eff, fs_seg)
        for h, e in zip(hs_used, etas, strict=True)
    )
    unc = math.sqrt(1.0 / inv_var) if inv_var > 0 else df / math.sqrt(12.0)
    if record is None:
        unc *= _SPECTRAL_PATH_LOSS
    return SpeedEstimate(speed_hz=float(speed), uncertainty_hz=unc, harmonics=hs_used)


# ----------------------------------------------------------------------------- tach


def speed_from_tach(pulse_times_s: ArrayLike) -> TachSpeed:
    """Running speed (Hz) and phase reference from once-per-revolution pulse times (s).

    Each pulse is assigned its revolution number from the median interval (so a missed
    pulse does not halve the speed), then a least-squares line t = t0 + k T gives
    speed = 1/T with its standard error.

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
    k = np.rint((t - t[0]) / period0)
    if np.any(np.diff(k) <= 0):
        raise ValueError("pulse_times_s are too irregular to number the revolutions.")
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
    )
