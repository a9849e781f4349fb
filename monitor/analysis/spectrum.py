"""Amplitude spectra: Hann window, Welch averaging, integration, band RMS, peak interpolation.

All functions are pure. A :class:`Spectrum` is one-sided and amplitude-correct: a sinusoid
centred on a bin reads its amplitude (``scaling='peak'``) or its RMS (``scaling='rms'``).
Because the Hann window spreads a sinusoid over three bins and white noise over an
equivalent noise bandwidth of 1.5 bins, band RMS values divide the summed power by the
ENBW in bins (Parseval), and peak values are interpolated between bins.

References
----------
F. J. Harris, "On the use of windows for harmonic analysis with the discrete Fourier
transform", Proc. IEEE 66(1), 1978 (Hann coherent gain 0.5, ENBW 1.5 bins).
P. D. Welch, "The use of fast Fourier transform for the estimation of power spectra",
IEEE Trans. Audio Electroacoust. 15(2), 1967 (averaged overlapping segments).

One block transformed once (its rfft, DTFT and spectrum) is :mod:`monitor.analysis.record`.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass, replace
from typing import Literal

import numpy as np
import scipy.fft
from numpy.lib.stride_tricks import sliding_window_view
from numpy.typing import ArrayLike
from scipy.signal import get_window

from monitor.model import units, validate

MIN_SAMPLES = 16
SCALINGS = ("peak", "rms")


@dataclass(frozen=True, eq=False)
class Spectrum:
    """A one-sided amplitude spectrum.

    Attributes
    ----------
    freq_hz : numpy.ndarray
        Bin frequencies, Hz.
    amplitude : numpy.ndarray
        Amplitude per bin in ``unit``; a sinusoid on a bin centre reads its amplitude
        (``scaling='peak'``) or its RMS (``scaling='rms'``).
    unit : str
        Amplitude unit (``m/s^2``, ``g``, ``mm/s``, ``in/s``, ``um``, ``mil``).
    scaling : {'peak', 'rms'}
    resolution_hz : float
        Bin spacing, Hz.
    enbw_hz : float
        Equivalent noise bandwidth of the window, Hz (needed to turn the amplitude
        spectrum into band RMS values).
    averages : int
        Number of Welch segments averaged.
    segment_length : int or None
        Samples per segment (the FFT length); sample rate = resolution_hz x segment_length.
    """

    freq_hz: np.ndarray
    amplitude: np.ndarray
    unit: str
    scaling: Literal["peak", "rms"]
    resolution_hz: float
    enbw_hz: float
    averages: int = 1
    segment_length: int | None = None

    @property
    def quantity(self) -> units.Quantity:
        """``acceleration``, ``velocity`` or ``displacement``."""
        return units.quantity_of(self.unit)

    @property
    def fft_length(self) -> int:
        """Samples per transformed segment (``segment_length``, or the length implied by
        the number of bins when that is not recorded)."""
        return self.segment_length or 2 * (self.amplitude.size - 1)


@dataclass(frozen=True)
class Peak:
    """A spectral peak: frequency (Hz) and amplitude (peak, in the spectrum's unit),
    both interpolated between bins."""

    hz: float
    amplitude: float


# ----------------------------------------------------------------------------- caches


@functools.lru_cache(maxsize=32)
def hann(n: int) -> np.ndarray:
    """Periodic Hann window of ``n`` samples (read-only, cached).

    The periodic (DFT-even) form has coherent gain exactly 0.5 and ENBW exactly 1.5 bins.
    """
    w = get_window("hann", n)
    w.setflags(write=False)
    return w


@functools.lru_cache(maxsize=32)
def hann_sums(n: int) -> tuple[float, float]:
    """Sum and sum of squares of the periodic Hann window of ``n`` samples (cached)."""
    w = hann(n)
    return float(w.sum()), float(np.dot(w, w))


@functools.lru_cache(maxsize=32)
def bin_frequencies(n: int, fs_hz: float) -> np.ndarray:
    """Frequencies (Hz) of the rfft bins of ``n`` samples at ``fs_hz`` (read-only, cached)."""
    f = scipy.fft.rfftfreq(n, 1.0 / fs_hz)
    f.setflags(write=False)
    return f


# ----------------------------------------------------------------------------- validation


def check_spectrum(spectrum: object) -> Spectrum:
    """``spectrum`` when it is a :class:`Spectrum`; ValueError otherwise."""
    if not isinstance(spectrum, Spectrum):
        raise ValueError(f"spectrum must be a Spectrum, got {type(spectrum).__name__}.")
    return spectrum


# ----------------------------------------------------------------------------- spectrum


def amplitude_spectrum(
    samples: ArrayLike,
    fs_hz: float,
    unit: str,
    *,
    scaling: Literal["peak", "rms"] = "peak",
    segment_length: int | None = None,
    overlap: float = 0.5,
    detrend: bool = True,
) -> Spectrum:
    """One-sided, amplitude-correct spectrum of a real waveform (Hann window, Welch average).

    Parameters
    ----------
    samples : array_like
        Real waveform in ``unit`` (float32 or float64).
    fs_hz : float
        Sample rate, Hz.
    unit : str
        Unit of the samples (``m/s^2``, ``g``, ``mm/s``, ``in/s``, ``um``, ``mil``).
    scaling : {'peak', 'rms'}
        A sinusoid reads its peak amplitude or its RMS value.
    segment_length : int, optional
        Samples per Welch segment; default the whole record (one segment, finest
        resolution).
    overlap : float
        Fraction of overlap between segments, 0 <= overlap < 1 (0.5 suits Hann).
    detrend : bool
        Remove each segment's mean first (as ``scipy.signal.welch`` does by default).

    Returns
    -------
    Spectrum
        ``resolution_hz = fs_hz / segment_length``, ``enbw_hz = 1.5 x resolution_hz``.

    References
    ----------
    Harris 1978 (Hann window); Welch 1967 (averaging power over overlapping segments,
    then the square root, so noise averages and a stable sinusoid keeps its amplitude).
    """
    x = validate.real_samples(samples, minimum=MIN_SAMPLES)
    fs = validate.sample_rate_hz(fs_hz)
    units.check_unit(unit)
    if scaling not in SCALINGS:
        raise ValueError(f"scaling {scaling!r} is not allowed; use 'peak' or 'rms'.")
    n = x.size if segment_length is None else validate.whole_number(
        segment_length, "segment_length", minimum=MIN_SAMPLES, maximum=x.size)
    validate.in_range(overlap, "overlap", 0.0, 1.0, low_open=False)
    step = max(1, int(round(n * (1.0 - overlap))))
    w = hann(n)
    s1, s2 = hann_sums(n)
    if n == x.size:
        spec = scipy.fft.rfft(x * w)
        if detrend:
            # rfft of the periodic Hann window is n/2 at bin 0, -n/4 at bin 1 and zero
            # elsewhere, so removing the mean only changes those two bins
            mean = x.mean()
            spec[0] -= mean * 0.5 * n
            spec[1] += mean * 0.25 * n
        power = spec.real * spec.real + spec.imag * spec.imag
        averages = 1
    else:
        segs = sliding_window_view(x, n)[::step]
        if detrend:
            segs = segs - segs.mean(axis=1, keepdims=True)
        power = (np.abs(scipy.fft.rfft(segs * w, axis=1)) ** 2).mean(axis=0)
        averages = segs.shape[0]
    # One-sided power per bin in units^2 (RMS^2 of a bin-centred sinusoid), as
    # scipy.signal.welch(scaling='spectrum'): divide by (sum w)^2 and double all bins
    # except DC and (even n) Nyquist.
    power *= 2.0 / (s1 * s1)
    power[0] *= 0.5
    if n % 2 == 0:
        power[-1] *= 0.5
    if scaling == "peak":
        power *= _peak_factor2(n, power.size)
    amp = np.sqrt(power)
    resolution = fs / n
    return Spectrum(
        freq_hz=bin_frequencies(n, fs),
        amplitude=amp,
        unit=unit,
        scaling=scaling,
        resolution_hz=resolution,
        enbw_hz=resolution * n * s2 / (s1 * s1),
        averages=averages,
        segment_length=n,
    )


@functools.lru_cache(maxsize=32)
def _peak_factor2(n: int, m: int) -> np.ndarray:
    """Squared factor RMS -> peak per bin: 2 for sinusoids, 1 for DC and Nyquist (a
    constant or an alternating sequence reads its value)."""
    f = np.full(m, 2.0)
    f[0] = 1.0
    if n % 2 == 0:
        f[-1] = 1.0
    f.setflags(write=False)
    return f


def _power(spectrum: Spectrum) -> np.ndarray:
    """One-sided power per bin (units^2, RMS^2) of a spectrum of either scaling."""
    a2 = spectrum.amplitude * spectrum.amplitude
    if spectrum.scaling == "rms":
        return a2
    return a2 / _peak_factor2(spectrum.fft_length, a2.size)


# ----------------------------------------------------------------------------- integration


def _rescale(spectrum: Spectrum, factor: np.ndarray, unit: str) -> Spectrum:
    return replace(spectrum, amplitude=spectrum.amplitude * factor, unit=unit)


def integrate(
    spectrum: Spectrum,
    to: Literal["velocity", "displacement"] = "velocity",
    *,
    f_low_hz: float = 2.0,
) -> Spectrum:
    """Integrate an acceleration or velocity spectrum in the frequency domain.

    Parameters
    ----------
    spectrum : Spectrum
        Acceleration (``m/s^2``, ``g``) or velocity (``mm/s``, ``in/s``) spectrum.
    to : {'velocity', 'displacement'}
        Target quantity; output unit mm/s or um, same scaling (peak or RMS).
    f_low_hz : float
        Bins below this frequency (Hz) are set to zero, since 1/f (or 1/f^2) would
        amplify low-frequency sensor noise without bound.

    References
    ----------
    V(f) = A(f) / (j 2 pi f), D(f) = V(f) / (j 2 pi f): amplitudes divide by 2 pi f.
    """
    spectrum = check_spectrum(spectrum)
    steps = {"acceleration": {"velocity": 1, "displacement": 2}, "velocity": {"displacement": 1}}
    q = spectrum.quantity
    if to not in ("velocity", "displacement") or to not in steps.get(q, {}):
        raise ValueError(
            f"to {to!r} is not reachable by integrating a {q} spectrum; allowed: "
            f"{', '.join(steps.get(q, {})) or 'none'}."
        )
    f_low_hz = validate.frequency_hz(f_low_hz, "f_low_hz")
    n = spectrum.fft_length
    factor = _integration_factor(n, spectrum.resolution_hz * n, spectrum.unit, to, f_low_hz)
    return _rescale(spectrum, factor, units.BASE_UNIT[to])


@functools.lru_cache(maxsize=32)
def _integration_factor(n: int, fs_hz: float, unit: str, to: str, f_low_hz: float) -> np.ndarray:
    """Per-bin factor 1/(2 pi f) (or its square) with unit scaling, zero below f_low_hz."""
    f = bin_frequencies(n, fs_hz)
    omega = 2.0 * np.pi * np.where(f > 0, f, 1.0)
    keep = (f >= f_low_hz) & (f > 0)
    base = units.to_base_factor(unit)
    if units.quantity_of(unit) == "acceleration":
        vel = base * 1e3 / omega  # m/s^2 -> mm/s
        factor = vel if to == "velocity" else vel * 1e3 / omega  # mm/s -> um
    else:
        factor = base * 1e3 / omega
    out = np.where(keep, factor, 0.0)
    out.setflags(write=False)
    return out


def differentiate(
    spectrum: Spectrum, to: Literal["velocity", "acceleration"] = "velocity"
) -> Spectrum:
    """Differentiate a displacement or velocity spectrum in the frequency domain.

    Displacement (``um``, ``mil``) -> velocity (mm/s) or acceleration (m/s^2); velocity
    -> acceleration (m/s^2). Amplitudes multiply by 2 pi f; same scaling.

    References
    ----------
    V(f) = j 2 pi f D(f), A(f) = j 2 pi f V(f).
    """
    spectrum = check_spectrum(spectrum)
    steps = {"displacement": {"velocity": 1, "acceleration": 2}, "velocity": {"acceleration": 1}}
    q = spectrum.quantity
    if to not in steps.get(q, {}):
        raise ValueError(
            f"to {to!r} is not reachable by differentiating a {q} spectrum; allowed: "
            f"{', '.join(steps.get(q, {})) or 'none'}."
        )
    omega = 2.0 * np.pi * spectrum.freq_hz
    base = units.to_base_factor(spectrum.unit)
    if q == "displacement":
        vel = base * 1e-3 * omega  # um -> mm/s
        factor = vel if to == "velocity" else vel * 1e-3 * omega  # mm/s -> m/s^2
    else:
        factor = base * 1e-3 * omega
    return _rescale(spectrum, factor, units.BASE_UNIT[to])


def to_velocity(spectrum: Spectrum, *, f_low_hz: float = 2.0) -> Spectrum:
    """The velocity spectrum (mm/s) of any spectrum: integrated, differentiated or
    converted as the quantity needs; ``f_low_hz`` applies to integration only."""
    q = check_spectrum(spectrum).quantity
    if q == "acceleration":
        return integrate(spectrum, "velocity", f_low_hz=f_low_hz)
    if q == "displacement":
        return differentiate(spectrum, "velocity")
    if spectrum.unit == "mm/s":
        return spectrum
    return _rescale(spectrum, np.asarray(units.to_base_factor(spectrum.unit)), "mm/s")


# ----------------------------------------------------------------------------- band RMS


def band_rms(spectrum: Spectrum, f_lo_hz: float, f_hi_hz: float) -> float:
    """RMS value (in the spectrum's unit) of the content between ``f_lo_hz`` and ``f_hi_hz``.

    Sums the one-sided power of the bins with f_lo_hz <= f <= f_hi_hz and divides by the
    window's ENBW in bins, so both a sinusoid (spread over the window's main lobe) and
    broadband noise (each bin collecting ENBW worth of noise) read their true RMS.

    References
    ----------
    Parseval's theorem; Harris 1978 (ENBW); scipy.signal.welch density vs spectrum scaling.
    """
    spectrum = check_spectrum(spectrum)
    f_lo_hz = validate.frequency_hz(f_lo_hz, "f_lo_hz")
    f_hi_hz = validate.frequency_hz(f_hi_hz, "f_hi_hz")
    if f_hi_hz < f_lo_hz:
        raise ValueError(f"f_hi_hz {f_hi_hz!r} must not be below f_lo_hz {f_lo_hz!r}.")
    df = spectrum.resolution_hz
    i0 = max(0, int(math.ceil(f_lo_hz / df - 1e-9)))
    i1 = min(spectrum.amplitude.size - 1, int(math.floor(f_hi_hz / df + 1e-9)))
    if i1 < i0:
        return 0.0
    total = float(_power(spectrum)[i0 : i1 + 1].sum())
    return math.sqrt(total * df / spectrum.enbw_hz)


# ----------------------------------------------------------------------------- peaks


def hann_interpolate(a: np.ndarray, k: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Offset (bins) and amplitude correction of Hann-window peaks at bins ``k``.

    The three-bin ratio delta = 2 (a[k+1] - a[k-1]) / (a[k-1] + 2 a[k] + a[k+1]) is exact
    for the Hann main lobe of a single sinusoid; the amplitude is a[k] divided by the
    window's normalised response sinc(delta) / (1 - delta^2).
    """
    k = np.clip(k, 1, a.size - 2)
    am, a0, ap = a[k - 1], a[k], a[k + 1]
    den = am + 2.0 * a0 + ap
    delta = np.where(den > 0, 2.0 * (ap - am) / np.where(den > 0, den, 1.0), 0.0)
    gain = np.sinc(delta) / (1.0 - delta * delta)
    return k + delta, a0 / gain


def find_peaks(spectrum: Spectrum, count: int = 10, min_hz: float = 0.0) -> tuple[Peak, ...]:
    """The ``count`` largest local maxima at or above ``min_hz``, largest first.

    Frequency (Hz) and amplitude (the spectrum's unit and scaling) are interpolated
    between bins with the exact three-bin Hann formula, so an off-bin sinusoid reads its
    true frequency and amplitude (no scalloping loss).
    """
    spectrum = check_spectrum(spectrum)
    validate.whole_number(count, "count", minimum=0)
    min_hz = validate.frequency_hz(min_hz, "min_hz")
    a = spectrum.amplitude
    start = max(1, int(math.ceil(min_hz / spectrum.resolution_hz)))
    if count == 0 or start >= a.size - 1:
        return ()
    mid = a[start:-1]
    is_peak = (mid > a[start - 1 : -2]) & (mid >= a[start + 1 :])
    idx = np.flatnonzero(is_peak) + start
    if idx.size > count:
        idx = idx[np.argpartition(a[idx], -count)[-count:]]
    pos, amp = hann_interpolate(a, idx)
    order = np.argsort(-amp, kind="stable")
    df = spectrum.resolution_hz
    return tuple(Peak(hz=float(pos[i] * df), amplitude=float(amp[i])) for i in order)


def amplitude_at(spectrum: Spectrum, freq_hz: float, tolerance_hz: float) -> Peak:
    """The interpolated peak nearest ``freq_hz``: the largest bin within ``tolerance_hz``
    (at least one bin either side), interpolated as in :func:`find_peaks`."""
    spectrum = check_spectrum(spectrum)
    df = spectrum.resolution_hz
    a = spectrum.amplitude
    freq_hz = validate.frequency_hz(freq_hz, "freq_hz", positive=True)
    if freq_hz > spectrum.freq_hz[-1]:
        raise ValueError(
            f"freq_hz {freq_hz!r} lies above the spectrum's last bin {spectrum.freq_hz[-1]:g} Hz."
        )
    tolerance_hz = validate.frequency_hz(tolerance_hz, "tolerance_hz")
    tol = max(tolerance_hz, df)
    i0 = max(1, int(math.floor((freq_hz - tol) / df)))
    i1 = min(a.size - 2, int(math.ceil((freq_hz + tol) / df)))
    i1 = max(i1, i0)
    k = i0 + int(np.argmax(a[i0 : i1 + 1]))
    pos, amp = hann_interpolate(a, np.array([k]))
    return Peak(hz=float(pos[0] * df), amplitude=float(amp[0]))
