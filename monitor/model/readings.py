"""Readings as they arrive from sensors: a waveform block or a speed reading.

These are the validated, decoded forms of the MQTT payloads of docs/mqtt.md ("Inbound payloads");
``monitor.io.ingest`` builds them from raw messages, ``monitor.io.streams`` reads and writes
them as ``.jsonl`` stream files, the simulator produces them.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True, eq=False)
class Waveform:
    """One block of samples from one measurement point.

    Attributes
    ----------
    machine, point : str
        Registry ids.
    ts : float
        Time of the block's first sample, seconds since the Unix epoch (UTC).
    fs_hz : float
        Sample rate, Hz.
    unit : str
        Unit of the samples: ``m/s^2``, ``g``, ``mm/s``, ``in/s``, ``um`` or ``mil``.
    samples : numpy.ndarray
        1-D float64 array of samples in ``unit``.
    speed_hz : float or None
        Running speed measured at the same time, Hz (rev/s), when the sensor sent one.
    reading_id : str or None
        The sender's id for the reading, if any.
    once_per_rev_s : numpy.ndarray or None
        Once-per-revolution pulse times, seconds from the first sample (1-D float64,
        non-decreasing, within the block), when the sensor sent them; may be empty.
    """

    machine: str
    point: str
    ts: float
    fs_hz: float
    unit: str
    samples: np.ndarray
    speed_hz: float | None = None
    reading_id: str | None = None
    once_per_rev_s: np.ndarray | None = None


@dataclass(frozen=True)
class SpeedReading:
    """A running-speed reading: ``speed_hz`` in Hz (rev/s) at ``ts`` (epoch seconds UTC)."""

    machine: str
    ts: float
    speed_hz: float
