"""One mode: a damped single-degree-of-freedom oscillator integrated in the time domain.

Every mode of the simulator (:mod:`monitor.sim.simulate`) and the ringing of a bearing
defect go through :func:`sdof_response`: the exact first-order-hold discretisation of the
oscillator's state equations, run as a recursive filter (``scipy.signal.lfilter``).

References
----------
W. T. Thomson, *Theory of Vibration with Applications*: forced harmonic vibration of a
damped SDOF system.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import signal

from monitor.model import units, validate
from monitor.model.units import Quantity


def _sdof_filter(
    fs_hz: float, frequency_hz: float, damping_ratio: float, output: Quantity
) -> tuple[np.ndarray, np.ndarray]:
    w = 2.0 * math.pi * frequency_hz
    a_c = np.array([[0.0, 1.0], [-w * w, -2.0 * damping_ratio * w]])
    b_c = np.array([[0.0], [1.0]])
    c_c = {
        "displacement": np.array([[1.0, 0.0]]),
        "velocity": np.array([[0.0, 1.0]]),
        "acceleration": np.array([[-w * w, -2.0 * damping_ratio * w]]),
    }[output]
    d_c = np.array([[1.0 if output == "acceleration" else 0.0]])
    # First-order hold is exact for a piecewise-linear input, so a sampled smooth force
    # keeps its phase (zero-order hold would lag by half a sample).
    ad, bd, cd, dd, _ = signal.cont2discrete((a_c, b_c, c_c, d_c), 1.0 / fs_hz, method="foh")
    b, a = signal.ss2tf(ad, bd, cd, dd)
    return np.asarray(b[0], dtype=float), np.asarray(a, dtype=float)


def sdof_response(
    force_per_mass: np.ndarray,
    fs_hz: float,
    frequency_hz: float,
    damping_ratio: float,
    output: Quantity = "displacement",
) -> np.ndarray:
    """Response of a damped SDOF oscillator started at rest, integrated in the time domain.

    Solves ``x'' + 2 zeta omega_n x' + omega_n^2 x = u(t)`` with ``u`` = force / mass
    (m/s^2) sampled at ``fs_hz``, using the exact first-order-hold discretisation of the
    state equations run as a recursive filter.

    Parameters
    ----------
    force_per_mass : array
        Force divided by (modal) mass, m/s^2, one value per sample.
    fs_hz : float
        Sample rate, Hz.
    frequency_hz : float
        Undamped natural frequency, Hz.
    damping_ratio : float
        0 < zeta < 1.
    output : {'displacement', 'velocity', 'acceleration'}
        Returned quantity: m, m/s or m/s^2 (absolute acceleration x'').

    Returns
    -------
    numpy.ndarray of the same length.

    References
    ----------
    W. T. Thomson, Theory of Vibration with Applications: forced harmonic vibration; the
    steady state is x = (u0/omega_n^2) H(r) cos(Omega t - phi) with
    H = 1/sqrt((1-r^2)^2 + (2 zeta r)^2), phi = atan2(2 zeta r, 1 - r^2).
    """
    u = np.asarray(force_per_mass, dtype=float)
    if u.ndim != 1:
        raise ValueError(f"force_per_mass must be a 1-D array, got shape {u.shape}.")
    fs_hz = validate.sample_rate_hz(fs_hz)
    frequency_hz = validate.positive(frequency_hz, "frequency_hz")
    if frequency_hz >= fs_hz / 2:
        raise ValueError(
            f"frequency_hz must be below the Nyquist frequency {fs_hz / 2} Hz, got {frequency_hz!r}."
        )
    damping_ratio = validate.in_range(damping_ratio, "damping_ratio", 0.0, 1.0)
    output = units.check_quantity(output, "output")
    b, a = _sdof_filter(fs_hz, frequency_hz, damping_ratio, output)
    return signal.lfilter(b, a, u)
