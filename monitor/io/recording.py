"""Recorded waveforms brought in from files (``whirlwatch import``, ``whirlwatch bumptest``):
what a reader of a recording format returns, and the checks they share.

A :class:`Recording` holds one or more channels, each a 1-D array of samples at a uniform
sample rate, in the file's own unit (WAV: fractions of full scale; CSV and UFF: the
numbers written). The readers live beside this module, one per format
(:mod:`monitor.io.wav_file`, :mod:`monitor.io.csv_waveform`, :mod:`monitor.io.uff58`);
:mod:`monitor.io.recording_files` picks one by the file's suffix and cuts the channels
into waveform readings. Each refuses a bad file with :class:`RecordingError`: one sentence
naming the file and what is wrong with it.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

#: Largest relative deviation of one time step from the mean step for a time column to
#: count as uniformly sampled (10 %: a time column printed with too few decimals at the
#: sample rate, or a missing sample, fails it).
UNIFORM_STEP_TOLERANCE = 0.10


class RecordingError(ValueError):
    """A recording file cannot be used; the message names the file and what is wrong."""

    def __init__(self, path: str | Path, problem: str) -> None:
        self.path = str(path)
        self.problem = problem
        super().__init__(f"{self.path}: {problem}")


@dataclass(frozen=True, eq=False)
class Channel:
    """One recorded channel: ``samples`` (1-D float64, the file's unit) at ``fs_hz`` (Hz);
    ``name`` as the file calls it; ``unit`` when the file states a unit whirlwatch knows."""

    name: str
    fs_hz: float
    samples: np.ndarray
    unit: str | None = None


@dataclass(frozen=True, eq=False)
class Recording:
    """The channels of one file, and the time of its first sample when the file states
    one (epoch seconds UTC; None otherwise)."""

    path: Path
    channels: tuple[Channel, ...]
    start_ts: float | None = None


def rate_from_times(path: str | Path, t: np.ndarray, what: str = "the time column") -> float:
    """The sample rate (Hz) of sample times ``t`` (s): ``(n - 1) / (t[-1] - t[0])``;
    RecordingError when there are fewer than two, they do not increase, or a step
    deviates from the mean step by more than :data:`UNIFORM_STEP_TOLERANCE`."""
    if t.size < 2:
        raise RecordingError(path, f"{what} has fewer than two times, so no sample rate follows from it.")
    if not np.all(np.isfinite(t)):
        raise RecordingError(path, f"{what} holds a time that is not a finite number.")
    steps = np.diff(t)
    if np.any(steps <= 0):
        i = int(np.argmax(steps <= 0))
        raise RecordingError(path, f"{what} does not increase at sample {i + 2} ({t[i]:g} s then {t[i + 1]:g} s).")
    mean = float(t[-1] - t[0]) / (t.size - 1)
    dev = np.abs(steps - mean) / mean
    if float(dev.max()) > UNIFORM_STEP_TOLERANCE:
        i = int(np.argmax(dev))
        raise RecordingError(
            path, f"{what} is not uniformly sampled: the step at sample {i + 2} is {steps[i]:g} s "
                  f"against a mean step of {mean:g} s.")
    return 1.0 / mean
