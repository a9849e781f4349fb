"""Recording files into waveform readings: pick the reader by suffix, then cut each
channel into blocks, scaled to the engineering unit, as the
:class:`~monitor.model.readings.Waveform` a sensor would have sent.

Suffixes: ``.wav`` (:mod:`monitor.io.wav_file`), ``.csv`` / ``.txt``
(:mod:`monitor.io.csv_waveform`), ``.uff`` / ``.unv`` (:mod:`monitor.io.uff58`). Each
channel maps to a point (``-`` leaves a channel out), with a unit (the file's, when it
states one, unless given) and a calibration factor (engineering unit per file unit; for
WAV per full scale). A block's time is the recording's start plus its offset.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

from monitor.io.csv_waveform import KNOWN_UNITS, read_csv
from monitor.io.recording import Recording, RecordingError
from monitor.io.uff58 import read_uff58
from monitor.io.wav_file import read_wav
from monitor.model.readings import Waveform

#: Suffix -> format name.
FORMATS = {".wav": "wav", ".csv": "csv", ".txt": "csv", ".uff": "uff", ".unv": "uff"}
#: Longest block by default, samples (the ingest limit of one waveform, docs/mqtt.md).
MAX_BLOCK_SAMPLES = 1 << 20
#: Shortest block, samples (the ingest limit).
MIN_BLOCK_SAMPLES = 64
#: Channel placeholder for "leave this channel out".
SKIP = "-"


def read_recording(path: Path, *, fs_hz: float | None = None, time_column: str | None = None) -> Recording:
    """The recording in ``path``, read by its suffix; RecordingError naming the file when the
    suffix is unknown, the file is missing or empty, or its reader refuses it."""
    fmt = FORMATS.get(path.suffix.lower())
    if fmt is None:
        raise RecordingError(path, f"has suffix {path.suffix or '(none)'!r}; recordings are "
                                   f"{', '.join(sorted(FORMATS))} files.")
    if not path.is_file():
        raise RecordingError(path, "does not exist or is not a file.")
    if path.stat().st_size == 0:
        raise RecordingError(path, "is empty.")
    if fs_hz is not None and fmt != "csv":
        raise RecordingError(path, f"is a {fmt.upper()} file, which states its own sample rate; "
                                   "--fs is for CSV files without a time column.")
    if fmt == "wav":
        return read_wav(path)
    if fmt == "uff":
        return read_uff58(path)
    return read_csv(path, fs_hz=fs_hz, time_column=time_column)


@dataclass(frozen=True)
class ChannelMap:
    """Where each channel goes: one point per channel (``-`` to leave it out), and one
    unit and calibration for all channels or one per channel (a unit None: the file's)."""

    points: Sequence[str]
    units: Sequence[str | None] = (None,)
    calibrations: Sequence[float] = (1.0,)

    def of(self, values: Sequence, i: int) -> object:
        return values[0] if len(values) == 1 else values[i]


def to_waveforms(rec: Recording, machine: str, chans: ChannelMap, *, start_ts: float | None,
                 block_samples: int | None = None) -> list[Waveform]:
    """Each mapped channel of ``rec`` cut into blocks of ``block_samples`` (default: the whole
    channel, or :data:`MAX_BLOCK_SAMPLES` blocks when longer; a shorter tail is dropped),
    times the calibration, as waveforms of ``machine`` in time order. ``start_ts`` (epoch s)
    overrides the recording's own start; one of them is needed. RecordingError naming the
    file when the map does not fit the channels or a unit is unknown."""
    path = rec.path
    n = len(rec.channels)
    if len(chans.points) != n:
        raise RecordingError(path, f"has {n} channel(s) ({', '.join(c.name for c in rec.channels)}) but "
                                   f"{len(chans.points)} point(s) were given; give one --point per channel "
                                   f"('{SKIP}' leaves one out).")
    for name, values in (("--unit", chans.units), ("--calibration", chans.calibrations)):
        if len(values) not in (1, n):
            raise RecordingError(path, f"has {n} channel(s) but {len(values)} {name} values were given; "
                                       "give one for all or one per channel.")
    t0 = start_ts if start_ts is not None else rec.start_ts
    if t0 is None:
        raise RecordingError(path, "states no start time; give --start.")
    out: list[Waveform] = []
    for i, ch in enumerate(rec.channels):
        point = chans.points[i]
        if point == SKIP:
            continue
        unit = chans.of(chans.units, i) or ch.unit
        if unit is None:
            raise RecordingError(path, f"does not state the unit of {ch.name}; give --unit.")
        if unit not in KNOWN_UNITS:
            raise RecordingError(path, f"{ch.name}: unit {unit!r} is not one of {', '.join(KNOWN_UNITS)}.")
        cal = float(chans.of(chans.calibrations, i))  # type: ignore[arg-type]
        if not math.isfinite(cal) or cal == 0:
            raise RecordingError(path, f"{ch.name}: the calibration factor must be a finite non-zero number.")
        size = block_samples or (ch.samples.size if ch.samples.size <= MAX_BLOCK_SAMPLES else MAX_BLOCK_SAMPLES)
        if ch.samples.size < max(size, MIN_BLOCK_SAMPLES):
            raise RecordingError(path, f"{ch.name} holds {ch.samples.size} samples, fewer than one block of "
                                       f"{max(size, MIN_BLOCK_SAMPLES)}.")
        for b in range(ch.samples.size // size):
            out.append(Waveform(machine=machine, point=point, ts=t0 + b * size / ch.fs_hz, fs_hz=ch.fs_hz,
                                unit=str(unit), samples=ch.samples[b * size:(b + 1) * size] * cal))
    out.sort(key=lambda w: w.ts)
    return out
