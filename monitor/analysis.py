"""Full analysis of one waveform: the contract every later stage reads.

``analyse_waveform`` composes the pure pieces (``spectrum``, ``speed``, ``orders``) into
one :class:`ReadingAnalysis`. Detection, the store, the CLI ``analyse`` command and the
dashboard all read this dataclass; extend it, don't break it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np

from monitor.readings import Waveform
from monitor.registry import Machine, Point


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
    """

    freq_hz: np.ndarray
    amplitude: np.ndarray
    unit: str
    scaling: Literal["peak", "rms"]
    resolution_hz: float
    enbw_hz: float
    averages: int = 1


@dataclass(frozen=True)
class Peak:
    """A spectral peak: frequency (Hz) and amplitude (peak, in the spectrum's unit),
    both interpolated between bins."""

    hz: float
    amplitude: float


@dataclass(frozen=True)
class OrderAmplitude:
    """Amplitude at one order of running speed.

    ``order`` (1.0 = 1x), ``frequency_hz`` = order x running speed (Hz), ``amplitude``
    peak in the point's unit, ``velocity_mm_s`` peak velocity (mm/s) at that order,
    ``phase_deg`` relative to the once-per-revolution reference when there is one.
    """

    order: float
    frequency_hz: float
    amplitude: float
    velocity_mm_s: float
    phase_deg: float | None = None


@dataclass(frozen=True, eq=False)
class ReadingAnalysis:
    """Everything the analysis derives from one waveform.

    Attributes
    ----------
    machine, point : str
    ts : float
        Epoch seconds UTC of the block.
    speed_hz : float
        Running speed used, Hz (rev/s).
    speed_source : {'measured', 'estimated'}
    speed_uncertainty_hz : float
        One standard deviation of ``speed_hz``, Hz (0 when measured).
    overall_velocity_mm_s_rms : float
        Band-limited overall velocity, mm/s RMS (ISO 20816 band, default 10-1000 Hz).
    orders : tuple of OrderAmplitude
        1x, 2x and every excitation order of the machine, no duplicates, ascending.
    one_x_normalised : float
        1x peak velocity (mm/s) divided by the square of running speed (Hz^2); an
        unbalance force grows with speed squared, so this stays flat with speed and rises
        with unbalance.
    peaks : tuple of Peak
        Largest spectral peaks (native unit, peak), largest first.
    spectrum : Spectrum
        Native-unit amplitude spectrum (peak scaling).
    velocity_spectrum : Spectrum
        Velocity amplitude spectrum, mm/s peak (integrated when the sensor is not a
        velocity sensor).
    reading_id : str or None
    """

    machine: str
    point: str
    ts: float
    speed_hz: float
    speed_source: Literal["measured", "estimated"]
    speed_uncertainty_hz: float
    overall_velocity_mm_s_rms: float
    orders: tuple[OrderAmplitude, ...]
    one_x_normalised: float
    peaks: tuple[Peak, ...]
    spectrum: Spectrum
    velocity_spectrum: Spectrum
    reading_id: str | None = None
    extra: dict[str, Any] = field(default_factory=dict)

    def order(self, order: float) -> OrderAmplitude | None:
        """The amplitude at ``order`` (1.0 = 1x), or None if not computed."""
        for o in self.orders:
            if abs(o.order - order) < 1e-9:
                return o
        return None


def analyse_waveform(waveform: Waveform, machine: Machine, point: Point) -> ReadingAnalysis:
    """Analyse one waveform of ``point`` on ``machine``; see :class:`ReadingAnalysis`."""
    raise NotImplementedError("filled in by the analysis core")
