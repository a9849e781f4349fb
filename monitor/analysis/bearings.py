"""Rolling-element bearing defects: defect frequencies and envelope analysis.

A localised defect on a race or a rolling element makes a short impact each time a
rolling element passes over it. Each impact rings a high-frequency resonance of the
bearing housing or the sensor mount; the impacts repeat at a defect frequency (BPFO,
BPFI, BSF, FTF) that depends only on the bearing geometry and the shaft speed. The
defect frequency itself carries little energy, but the *envelope* of the ringing, once
the signal is band-passed around the resonance, is modulated at it. So:

1. choose a demodulation band where the signal is most impulsive (the band of highest
   spectral kurtosis among a few octave and third-octave candidates, Antoni 2006/2007),
   or take one given by the engineer;
2. band-pass the acceleration there and take the magnitude of its analytic signal
   (Hilbert envelope, ``scipy.signal.hilbert``);
3. read the envelope spectrum (Hann window, amplitude-correct) at 1x, 2x, 3x each
   defect frequency, searching +-2 % because rolling elements slip, plus the shaft-speed
   sidebands of BPFI (an inner-race defect turns with the shaft through the load zone);
4. compare each line with the envelope spectrum's median (its noise floor) in dB.

Everything here is pure: arrays and dataclasses in, dataclasses out. The geometry and
its defect frequencies are :mod:`monitor.model.bearing_geometry`.

References
----------
R. B. Randall and J. Antoni, "Rolling element bearing diagnostics: a tutorial",
Mechanical Systems and Signal Processing 25 (2011) 485-520 (defect frequencies, section 2;
slip of 1-2 %; envelope analysis, section 3).
J. Antoni, "The spectral kurtosis: a useful tool for characterising non-stationary
signals", Mechanical Systems and Signal Processing 20 (2006) 282-307.
J. Antoni, "Fast computation of the kurtogram for the detection of transient faults",
Mechanical Systems and Signal Processing 21 (2007) 108-124 (the 1/3-binary band tree).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import scipy.fft
from numpy.typing import ArrayLike
from scipy import signal

from monitor.analysis import spectrum as sp
from monitor.analysis.record import Record
from monitor.model import units, validate
from monitor.model.bearing_geometry import DEFECTS, BearingGeometry, DefectFrequencies

__all__ = [
    "INDICATOR_HARMONIC",
    "BandChoice",
    "BearingAnalysis",
    "analyse_bearing",
    "choose_band",
    "envelope_spectrum",
    "spectral_kurtosis",
]

#: Numbers of equal bands [0, fs/2] is cut into for the candidate demodulation bands:
#: the levels of the 1/3-binary tree of the fast kurtogram (Antoni 2007): 2 bands are
#: octaves of fs/2, 3 bands are third-splits, and so on.
BAND_LEVELS = (2, 3, 4, 6, 8, 12, 16)

#: Default search half-width around each defect line, percent (slip 1-2 %, Randall and
#: Antoni 2011).
SLIP_PCT = 2.0

#: Harmonics of each defect frequency read from the envelope spectrum.
HARMONICS = 3

#: The harmonic whose line makes the indicator: 1x for the races and the cage, 2x for
#: the rolling element, which strikes both races once per spin revolution (Randall and
#: Antoni 2011, section 2).
INDICATOR_HARMONIC = {"bpfo": 1, "bpfi": 1, "bsf": 2, "ftf": 1}


# ----------------------------------------------------------------------------- bands


@dataclass(frozen=True)
class BandChoice:
    """A demodulation band.

    ``lo_hz``, ``hi_hz`` its edges (Hz); ``kurtosis`` the spectral kurtosis of the
    signal in it (dimensionless, 0 for Gaussian noise, -1 for a pure tone);
    ``source`` ``"kurtosis"`` when chosen automatically, ``"given"`` otherwise.
    """

    lo_hz: float
    hi_hz: float
    kurtosis: float
    source: Literal["kurtosis", "given"]


def _band_bins(n: int, fs_hz: float, lo_hz: float, hi_hz: float) -> tuple[int, int]:
    """First and last rfft bin inside [lo, hi] (the DC and Nyquist bins excluded)."""
    df = fs_hz / n
    k0 = max(1, math.ceil(lo_hz / df - 1e-9))
    k1 = min(n // 2 - (1 if n % 2 == 0 else 0), math.floor(hi_hz / df + 1e-9))
    return k0, k1


def _kurtosis_of_bins(dft: np.ndarray) -> float:
    """Spectral kurtosis of the band whose rfft bins are ``dft``.

    The bins shifted to base band and inverse-transformed (twice oversampled) are the
    band's complex envelope; SK = <|c|^4> / <|c|^2>^2 - 2 (Antoni 2006, complex signal).
    """
    m = dft.size
    c = scipy.fft.ifft(dft, n=scipy.fft.next_fast_len(2 * m))
    p = c.real * c.real + c.imag * c.imag
    mean_p = float(p.mean())
    if mean_p <= 0.0:
        return math.nan
    return float(np.dot(p, p) / p.size / (mean_p * mean_p) - 2.0)


def spectral_kurtosis(
    samples: ArrayLike | Record, fs_hz: float | None, band_hz: tuple[float, float]
) -> float:
    """Spectral kurtosis of ``samples`` (any unit) in ``band_hz`` (Hz), dimensionless.

    0 for Gaussian noise, -1 for a single steady sinusoid, large and positive for
    repetitive impacts ringing inside the band.

    References
    ----------
    Antoni (2006), the spectral kurtosis of a complex band signal, <|c|^4>/<|c|^2>^2 - 2.
    """
    record = Record.of(samples, fs_hz)
    lo, hi = _check_band(band_hz, record.fs_hz, "band_hz")
    k0, k1 = _band_bins(record.samples.size, record.fs_hz, lo, hi)
    if k1 - k0 + 1 < 2:
        raise ValueError(f"band_hz {band_hz!r} holds fewer than two spectral lines.")
    return _kurtosis_of_bins(np.asarray(record.dft[k0 : k1 + 1]))


def _check_band(band_hz: object, fs_hz: float, name: str) -> tuple[float, float]:
    """A demodulation band (Hz) inside [0, fs/2]."""
    lo, hi = validate.ordered_pair(band_hz, name)
    if not hi <= fs_hz / 2.0:
        raise ValueError(
            f"{name} must satisfy low < high <= fs/2 = {fs_hz / 2.0:g} Hz, got {band_hz!r}."
        )
    return lo, hi


def choose_band(
    samples: ArrayLike | Record,
    fs_hz: float | None,
    *,
    min_low_hz: float,
    min_width_hz: float,
) -> BandChoice:
    """The candidate band of highest spectral kurtosis.

    Candidates: [0, fs/2] cut into 2, 3, 4, 6, 8, 12 and 16 equal bands (the
    1/3-binary tree of the fast kurtogram, Antoni 2007), keeping those that start at or
    above ``min_low_hz`` (Hz; so the band holds no shaft harmonics nor the defect lines
    themselves) and are at least ``min_width_hz`` wide (Hz; so the envelope can carry
    the highest line read).

    Raises
    ------
    ValueError
        When no candidate fits below fs/2 (sample rate too low for the lines asked).

    References
    ----------
    Antoni (2006, 2007); Randall and Antoni (2011), section 3.
    """
    record = Record.of(samples, fs_hz)
    fs = record.fs_hz
    n = record.samples.size
    min_low = validate.frequency_hz(min_low_hz, "min_low_hz")
    min_width = validate.frequency_hz(min_width_hz, "min_width_hz")
    dft = record.dft
    best: BandChoice | None = None
    nyq = fs / 2.0
    for count in BAND_LEVELS:
        width = nyq / count
        if width < min_width:
            break
        for i in range(count):
            lo, hi = i * width, (i + 1) * width
            if lo < min_low:
                continue
            k0, k1 = _band_bins(n, fs, lo, hi)
            if k1 - k0 + 1 < 4:
                continue
            kurt = _kurtosis_of_bins(dft[k0 : k1 + 1])
            if math.isfinite(kurt) and (best is None or kurt > best.kurtosis):
                best = BandChoice(lo, hi, kurt, "kurtosis")
    if best is None:
        raise ValueError(
            f"fs_hz {fs:g} is too low for envelope analysis: no band of at least "
            f"{min_width:g} Hz fits between {min_low:g} Hz and fs/2 = {nyq:g} Hz."
        )
    return best


# ----------------------------------------------------------------------------- envelope


def envelope_spectrum(
    samples: ArrayLike | Record, fs_hz: float | None, band_hz: tuple[float, float], unit: str
) -> sp.Spectrum:
    """Amplitude spectrum of the Hilbert envelope of ``samples`` band-passed to ``band_hz``.

    Parameters
    ----------
    samples : array_like or Record
        Waveform, in ``unit``.
    fs_hz : float
        Sample rate, Hz (None when ``samples`` is a Record).
    band_hz : (float, float)
        Demodulation band, Hz, 0 <= low < high <= fs/2.
    unit : str
        Unit of the samples; the result is in the same unit, peak.

    Returns
    -------
    Spectrum
        One-sided envelope spectrum (mean removed), Hann window, peak scaling: a
        sinusoidal modulation of the envelope of amplitude a reads a.

    Notes
    -----
    The band-pass is an ideal (FFT-mask) filter of the whole block; the envelope is
    ``abs(scipy.signal.hilbert(...))`` of the filtered block.

    References
    ----------
    Randall and Antoni (2011), section 3 (envelope analysis); Harris (1978), Hann window.
    """
    units.check_unit(unit)
    record = Record.of(samples, fs_hz)
    fs = record.fs_hz
    n = record.samples.size
    lo, hi = _check_band(band_hz, fs, "band_hz")
    k0, k1 = _band_bins(n, fs, lo, hi)
    if k1 < k0:
        raise ValueError(f"band_hz {band_hz!r} holds no spectral line at {fs / n:g} Hz spacing.")
    masked = np.zeros_like(record.dft)
    masked[k0 : k1 + 1] = record.dft[k0 : k1 + 1]
    band = scipy.fft.irfft(masked, n=n)
    env = np.abs(signal.hilbert(band))
    env -= env.mean()
    w = sp.hann(n)
    s1, s2 = float(w.sum()), float(np.dot(w, w))
    amp = np.abs(scipy.fft.rfft(env * w)) * (2.0 / s1)
    amp[0] *= 0.5
    if n % 2 == 0:
        amp[-1] *= 0.5
    df = fs / n
    return sp.Spectrum(
        freq_hz=sp.bin_frequencies(n, fs),
        amplitude=amp,
        unit=unit,
        scaling="peak",
        resolution_hz=df,
        enbw_hz=df * n * s2 / (s1 * s1),
        averages=1,
        segment_length=n,
    )


# ----------------------------------------------------------------------------- analysis


@dataclass(frozen=True, eq=False)
class BearingAnalysis:
    """Envelope analysis of one acceleration block against one bearing.

    Attributes
    ----------
    band : BandChoice
        Demodulation band, Hz, and its spectral kurtosis.
    shaft_hz : float
        Shaft speed used, Hz.
    frequencies : DefectFrequencies
        Defect frequencies, Hz.
    harmonics : mapping of defect -> tuple of float
        Envelope amplitude (m/s^2 peak) at 1x, 2x, 3x each defect frequency (NaN for a
        line above the envelope spectrum).
    bpfi_sidebands : (float, float)
        Envelope amplitude (m/s^2 peak) at BPFI - fr and BPFI + fr.
    floor : float
        Median of the envelope spectrum from 2 bins up to 1.2 x the highest line read,
        m/s^2 peak: the noise floor.
    indicator_db : mapping of defect -> float
        20 log10(line / floor), dB, the line being 1x the defect frequency (2x for BSF,
        see ``INDICATOR_HARMONIC``): about 0-10 dB on noise alone (the largest of a few
        bins), tens of dB with a developed defect.
    envelope : Spectrum
        The envelope spectrum, m/s^2 peak.
    """

    band: BandChoice
    shaft_hz: float
    frequencies: DefectFrequencies
    harmonics: Mapping[str, tuple[float, ...]]
    bpfi_sidebands: tuple[float, float]
    floor: float
    indicator_db: Mapping[str, float]
    envelope: sp.Spectrum

    def line(self, defect: str) -> float:
        """Envelope amplitude (m/s^2 peak) of the line behind ``indicator_db[defect]``."""
        return self.harmonics[defect][INDICATOR_HARMONIC[defect] - 1]

    def to_json(self) -> dict[str, Any]:
        """JSON-ready dict: band_hz, band_source, band_kurtosis, shaft_hz,
        frequencies_hz, envelope (amplitude of the indicator's line per defect: 1x, 2x
        for bsf; m/s^2 peak), harmonics
        (1x-3x per defect), bpfi_sidebands ([BPFI - fr, BPFI + fr]), floor and
        indicator_db (per defect). NaN stays NaN; the CLI turns it into null."""
        return {
            "band_hz": [self.band.lo_hz, self.band.hi_hz],
            "band_source": self.band.source,
            "band_kurtosis": self.band.kurtosis,
            "shaft_hz": self.shaft_hz,
            "frequencies_hz": self.frequencies.as_dict(),
            "envelope": {k: self.line(k) for k in self.harmonics},
            "harmonics": {k: list(v) for k, v in self.harmonics.items()},
            "bpfi_sidebands": list(self.bpfi_sidebands),
            "floor": self.floor,
            "indicator_db": dict(self.indicator_db),
            "unit": "m/s^2",
        }


def _line(env: sp.Spectrum, f_hz: float, slip: float) -> float:
    if not 0.0 < f_hz < float(env.freq_hz[-2]):
        return math.nan
    return sp.amplitude_at(env, f_hz, slip * f_hz).amplitude


def analyse_bearing(
    samples: ArrayLike | Record,
    fs_hz: float | None,
    shaft_hz: float,
    geometry: BearingGeometry,
    *,
    unit: str = "m/s^2",
    band_hz: tuple[float, float] | None = None,
    slip_pct: float = SLIP_PCT,
) -> BearingAnalysis:
    """Envelope analysis of an acceleration block at the defect frequencies of ``geometry``.

    Parameters
    ----------
    samples : array_like or Record
        Acceleration waveform in ``unit``.
    fs_hz : float or None
        Sample rate, Hz (None when ``samples`` is a Record).
    shaft_hz : float
        Shaft speed, Hz.
    geometry : BearingGeometry
    unit : str
        An acceleration unit (``m/s^2`` or ``g``); results are in m/s^2 peak.
    band_hz : (float, float), optional
        Demodulation band, Hz. Default: :func:`choose_band` (highest spectral kurtosis).
    slip_pct : float
        Search half-width around each line, percent of its frequency (at least one bin).

    Returns
    -------
    BearingAnalysis

    Raises
    ------
    ValueError
        Bad samples, sample rate, unit, speed, band or slip, or a sample rate too low
        for any demodulation band above the lines read.

    References
    ----------
    Randall and Antoni (2011); Antoni (2006, 2007).
    """
    if units.quantity_of(units.check_unit(unit)) != "acceleration":
        raise ValueError(f"unit must be an acceleration unit (m/s^2 or g), got {unit!r}.")
    if not isinstance(geometry, BearingGeometry):
        raise ValueError(f"geometry must be a BearingGeometry, got {type(geometry).__name__}.")
    validate.in_range(slip_pct, "slip_pct", 0.0, 10.0, low_open=False, high_open=False, unit=" %")
    record = Record.of(samples, fs_hz)
    fs = record.fs_hz
    fr = validate.frequency_hz(shaft_hz, "shaft_hz", positive=True)
    freqs = DefectFrequencies(
        ftf=geometry.ftf_order * fr,
        bpfo=geometry.bpfo_order * fr,
        bpfi=geometry.bpfi_order * fr,
        bsf=geometry.bsf_order * fr,
        unit="Hz",
    )
    slip = float(slip_pct) / 100.0
    top = max(HARMONICS * max(freqs.bpfo, freqs.bpfi, freqs.bsf), freqs.bpfi + fr)
    top *= 1.0 + slip
    if band_hz is None:
        # twice the highest line: a carrier mid-band keeps both its sidebands in the band
        band = choose_band(record, None, min_low_hz=top, min_width_hz=2.0 * top)
    else:
        lo, hi = _check_band(band_hz, fs, "band_hz")
        k0, k1 = _band_bins(record.samples.size, fs, lo, hi)
        kurt = _kurtosis_of_bins(record.dft[k0 : k1 + 1]) if k1 - k0 >= 1 else math.nan
        band = BandChoice(lo, hi, kurt, "given")

    env = envelope_spectrum(record, None, (band.lo_hz, band.hi_hz), unit)
    to_si = units.to_base_factor(unit)
    if to_si != 1.0:
        env = sp.Spectrum(
            env.freq_hz, env.amplitude * to_si, "m/s^2", "peak", env.resolution_hz,
            env.enbw_hz, env.averages, env.segment_length,
        )
    harmonics = {
        name: tuple(_line(env, k * getattr(freqs, name), slip) for k in range(1, HARMONICS + 1))
        for name in DEFECTS
    }
    sidebands = (_line(env, freqs.bpfi - fr, slip), _line(env, freqs.bpfi + fr, slip))
    df = env.resolution_hz
    i1 = min(env.amplitude.size - 1, int(1.2 * top / df) + 1)
    floor = float(np.median(env.amplitude[2 : i1 + 1])) if i1 > 2 else math.nan
    lines = {name: amps[INDICATOR_HARMONIC[name] - 1] for name, amps in harmonics.items()}
    indicator = {
        name: 20.0 * math.log10(max(a, 1e-300) / floor)
        if math.isfinite(a) and floor > 0
        else math.nan
        for name, a in lines.items()
    }
    return BearingAnalysis(
        band=band,
        shaft_hz=fr,
        frequencies=freqs,
        harmonics=harmonics,
        bpfi_sidebands=sidebands,
        floor=floor,
        indicator_db=indicator,
        envelope=env,
    )
