"""Order amplitudes and phases: the vibration at whole (or fractional) multiples of speed.

Each order's amplitude comes from the Hann-windowed DTFT of the waveform evaluated exactly
at order x speed (a single-bin synchronous demodulation), so there is no scalloping loss
and no bin rounding; with a once-per-revolution reference the same complex value gives the
phase.

Phase convention: a component A cos(k Omega (t - t_ref) - phi) has phase phi (degrees,
0-360): the angle by which its positive peak lags the reference pulse, in cycles of that
order (common practice for balancing and Bode plots).
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from monitor.analysis.record import Record
from monitor.analysis.spectrum import hann_sums
from monitor.model import units, validate


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


def normalise_orders(orders: Iterable[float]) -> tuple[float, ...]:
    """Positive finite orders, duplicates removed (to 1e-9), ascending."""
    out: list[float] = []
    for o in sorted(float(v) for v in orders):
        if not math.isfinite(o) or o <= 0:
            raise ValueError(f"orders must be positive finite multiples of speed, got {o!r}.")
        if not out or abs(o - out[-1]) > 1e-9:
            out.append(o)
    return tuple(out)


def order_amplitudes(
    samples: ArrayLike | Record,
    fs_hz: float,
    unit: str,
    speed_hz: float,
    orders: Iterable[float],
    *,
    reference_s: float | None = None,
) -> tuple[OrderAmplitude, ...]:
    """Amplitude (peak, ``unit``), velocity (mm/s peak) and phase at each order.

    Parameters
    ----------
    samples : array_like or Record
        Waveform in ``unit``; time zero is its first sample.
    fs_hz : float
        Sample rate, Hz (ignored when ``samples`` is a Record).
    unit : str
        Unit of the samples.
    speed_hz : float
        Running speed, Hz (rev/s).
    orders : iterable of float
        Orders of running speed (1 = 1x); deduplicated and sorted. Orders at or above
        the Nyquist frequency are left out.
    reference_s : float, optional
        Time (s from the first sample) of a once-per-revolution pulse; gives phases.

    Returns
    -------
    tuple of OrderAmplitude
        Ascending by order.

    References
    ----------
    Hann window coherent gain 0.5 (Harris 1978): amplitude = 2 |sum w x e^{-j w n}| /
    sum w for a sinusoid at exactly that frequency.
    """
    record = Record.of(samples, fs_hz)
    fs = record.fs_hz
    units.check_unit(unit)
    speed = validate.frequency_hz(speed_hz, "speed_hz", positive=True)
    ords = normalise_orders(orders)
    if reference_s is not None:
        validate.finite(reference_s, "reference_s")
    ords = tuple(o for o in ords if o * speed < 0.5 * fs)
    if not ords:
        return ()
    freqs = np.array(ords) * speed
    s1, _ = hann_sums(record.samples.size)
    z = record.dtft(freqs, window=True, half_width=32)
    amp = 2.0 * np.abs(z) / s1
    vel = np.asarray(units.velocity_mm_s_from(amp, unit, freqs))
    out = []
    for i, o in enumerate(ords):
        phase = None
        if reference_s is not None:
            # x = A cos(w t - theta) gives arg(z) = -theta; theta = w t_ref + phi
            phi = -math.atan2(z[i].imag, z[i].real) - 2.0 * math.pi * freqs[i] * reference_s
            phase = math.degrees(phi) % 360.0
        out.append(
            OrderAmplitude(
                order=o,
                frequency_hz=float(freqs[i]),
                amplitude=float(amp[i]),
                velocity_mm_s=float(vel[i]),
                phase_deg=phase,
            )
        )
    return tuple(out)
