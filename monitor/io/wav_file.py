"""WAV recordings (RIFF WAVE, PCM or IEEE float, also WAVE_FORMAT_EXTENSIBLE).

Read with :func:`scipy.io.wavfile.read`. Samples come back as fractions of full scale, the
same for every sample format, so one calibration factor (engineering unit per full scale)
serves a file whatever its bit depth:

- 8-bit PCM is unsigned with its zero at 128: ``(x - 128) / 128``;
- 16-, 24- and 32-bit PCM are signed: ``x / 2**(bits - 1)`` (scipy returns 24-bit data
  left-justified in int32, so ``/ 2**31`` is right for it as for 32-bit);
- 32- and 64-bit IEEE float are taken as they are (full scale 1.0 by convention).

Each channel of a multi-channel file is one :class:`~monitor.io.recording.Channel`.
A truncated data chunk (scipy warns "Reached EOF prematurely") is refused, not read short.
"""

from __future__ import annotations

import struct
import warnings
from pathlib import Path

import numpy as np
from scipy.io import wavfile

from monitor.io.recording import Channel, Recording, RecordingError


def full_scale(data: np.ndarray) -> np.ndarray:
    """WAV samples as float64 fractions of full scale (module docstring)."""
    if data.dtype == np.uint8:
        return (data.astype(np.float64) - 128.0) / 128.0
    if np.issubdtype(data.dtype, np.signedinteger):
        return data.astype(np.float64) / float(2 ** (8 * data.dtype.itemsize - 1))
    if np.issubdtype(data.dtype, np.floating):
        return data.astype(np.float64)
    raise TypeError(f"sample type {data.dtype} is not a WAV sample format")


def read_wav(path: Path) -> Recording:
    """The channels of WAV file ``path``; RecordingError naming the file when it is not a
    readable, complete WAV file or holds no samples."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", wavfile.WavFileWarning)
        try:
            fs, data = wavfile.read(path, mmap=False)
        except (ValueError, struct.error, EOFError, NotImplementedError) as exc:
            raise RecordingError(path, f"is not a readable WAV file ({str(exc).rstrip('.')}).") from None
    short = [w for w in caught if "EOF" in str(w.message)]
    if short:
        raise RecordingError(path, f"is truncated: {str(short[0].message).rstrip('.')}.")
    if data.size == 0:
        raise RecordingError(path, "holds no samples.")
    if not fs or fs <= 0:
        raise RecordingError(path, f"states a sample rate of {fs} Hz.")
    try:
        x = full_scale(data)
    except TypeError as exc:
        raise RecordingError(path, f"{exc}.") from None
    cols = x.reshape(x.shape[0], -1)
    return Recording(path, tuple(Channel(f"channel {i + 1}", float(fs), np.ascontiguousarray(cols[:, i]))
                                 for i in range(cols.shape[1])))
