"""Frequency response of an impact test: the H1 estimate with its coherence when a force
(hammer) channel exists, otherwise the amplitude spectrum of the decaying ring; and the
noise floor of either.

The noise floor is what the response channel's noise alone puts into the estimate, as an
RMS value at each frequency. The noise is taken as white with the standard deviation
``sigma_i`` of :func:`monitor.modes.noise.noise_level` of hit i's response record; the
DFT of n samples of it has ``E|N(f)|^2 = n sigma_i^2`` (Parseval). Over the hits,

    H1:                 floor(f) = sqrt(sum_i n sigma_i^2 |F_i(f)|^2) / sum_i |F_i(f)|^2
    response spectrum:  floor(f) = sqrt(mean_i n sigma_i^2) / fs

with ``F_i`` the DFT of hit i's force: where the hammer puts little force the floor rises.

References
----------
J. S. Bendat and A. G. Piersol, *Random Data*: the H1 frequency response estimate and the
ordinary coherence function (from memory).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
from numpy.typing import ArrayLike
from scipy import fft as sp_fft
from scipy import signal

from monitor.model import units, validate
from monitor.modes.noise import noise_level


def hit_records(records: Any, name: str) -> np.ndarray:
    """One record (1-D) or several equal-length hits (2-D or a list) as a float array of
    shape (hits, samples); ValueError naming ``name`` when ragged, short or not finite."""
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
    noise_floor : numpy.ndarray
        RMS contribution of the response channel's noise to ``response`` at each
        frequency, same unit (module docstring); zeros for noise-free records.
    """

    freq_hz: np.ndarray
    response: np.ndarray
    coherence: np.ndarray | None
    kind: Literal["H1", "response spectrum"]
    quantity: units.Quantity
    unit: str
    hits: int
    resolution_hz: float
    noise_floor: np.ndarray

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
    fs = validate.sample_rate_hz(fs_hz)
    y = hit_records(response, "response")
    q = units.check_quantity(quantity)
    validate.whole_number(pad_factor, "pad_factor", minimum=1, maximum=64)
    n = y.shape[1]
    nfft = sp_fft.next_fast_len(int(pad_factor) * n)
    noise_power = n * np.array([noise_level(hit) for hit in y]) ** 2  # E|N(f)|^2 per hit
    opts: dict[str, Any] = dict(
        fs=fs, window="boxcar", nperseg=n, noverlap=0, nfft=nfft, detrend=False, axis=-1
    )
    if force is None:
        f, pyy = signal.welch(y, scaling="spectrum", **opts)
        # back from power to |DFT| / fs (a density of the transient's Fourier transform)
        mag = np.sqrt(np.mean(pyy, axis=0) * n * n / 2.0) / fs
        floor = np.full(f.shape, math.sqrt(float(np.mean(noise_power))) / fs)
        return FrequencyResponse(
            f, mag, None, "response spectrum", q, unit, y.shape[0], fs / n, floor
        )
    x = hit_records(force, "force")
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
    ff = np.abs(sp_fft.rfft(x, nfft, axis=-1)) ** 2  # |F_i(f)|^2, same grid as f
    floor = np.sqrt(noise_power @ ff) / np.maximum(ff.sum(axis=0), tiny)
    return FrequencyResponse(
        f, h1, np.clip(coh, 0.0, 1.0), "H1", q, f"{unit}/{force_unit}", y.shape[0], fs / n,
        floor,
    )
