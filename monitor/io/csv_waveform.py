"""CSV recordings: one column per channel, optionally a time column.

Delimiter ``,``, ``;`` or tab (the one the first data line uses); lines starting with
``#`` are comments. A first row with a cell that is not a number is the header; a header
cell may give its unit in brackets (``de-h [m/s^2]``, ``force (N)``).

The sample rate comes from ``fs_hz`` when given (then every column is a channel, unless
a time column is named), else from the time column: the one named ``time_column`` (header
name or 1-based number), else a column headed ``time``, ``t``, ``time_s`` or
``timestamp``, else the first. Times are seconds, or ISO 8601 times (then the first is the
recording's start). They must increase uniformly (:func:`monitor.io.recording.rate_from_times`).
"""

from __future__ import annotations

import csv
import io
import re
from pathlib import Path

import numpy as np

from monitor.io.recording import Channel, Recording, RecordingError, rate_from_times
from monitor.model import units
from monitor.model.timefmt import parse_iso_utc

_TIME_NAMES = ("time", "t", "time_s", "timestamp")
_UNIT_IN_HEADER = re.compile(r"^(.*?)\s*[\[(]\s*([^\])]+?)\s*[\])]\s*$")
KNOWN_UNITS = (*units.UNITS, *units.FORCE_UNITS)


def _number(text: str) -> float | None:
    try:
        return float(text)
    except ValueError:
        return None


def _rows(path: Path) -> list[list[str]]:
    try:
        text = path.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError:
        raise RecordingError(path, "is not UTF-8 text, so not a CSV file.") from None
    lines = [ln for ln in text.splitlines() if ln.strip() and not ln.lstrip().startswith("#")]
    if not lines:
        raise RecordingError(path, "holds no data lines.")
    probe = lines[1] if len(lines) > 1 else lines[0]
    delim = max((",", ";", "\t"), key=probe.count)
    return [[c.strip() for c in r] for r in csv.reader(io.StringIO("\n".join(lines)), delimiter=delim)]


def _split_unit(header: str) -> tuple[str, str | None]:
    m = _UNIT_IN_HEADER.match(header)
    if m and m.group(2) in KNOWN_UNITS:
        return m.group(1) or header, m.group(2)
    return header, None


def _time_index(path: Path, header: list[str] | None, time_column: str | None, width: int) -> int:
    if time_column is not None:
        if header is not None and time_column in header:
            return header.index(time_column)
        if time_column.isdigit() and 1 <= int(time_column) <= width:
            return int(time_column) - 1
        raise RecordingError(path, f"has no column {time_column!r} to take the times from.")
    if header is not None:
        for i, h in enumerate(header):
            if _split_unit(h)[0].lower() in _TIME_NAMES:
                return i
    return 0


def _times(path: Path, cells: list[str]) -> tuple[np.ndarray, float | None]:
    """Seconds from the first sample, and the epoch time of the first when they are ISO times."""
    nums = [_number(c) for c in cells]
    if all(v is not None for v in nums):
        return np.array(nums, dtype=np.float64), None
    try:
        stamps = np.array([parse_iso_utc(c).timestamp() for c in cells], dtype=np.float64)
    except ValueError:
        bad = next(c for c, v in zip(cells, nums, strict=True) if v is None)
        raise RecordingError(path, f"has a time {bad!r} that is neither seconds nor an ISO 8601 time.") from None
    return stamps - stamps[0], float(stamps[0])


def read_csv(path: Path, *, fs_hz: float | None = None, time_column: str | None = None) -> Recording:
    """The channels of CSV file ``path`` (module docstring); RecordingError naming the file
    and, for a bad cell, its line and column."""
    rows = _rows(path)
    header = rows[0] if any(_number(c) is None for c in rows[0]) else None
    data = rows[1:] if header is not None else rows
    if not data:
        raise RecordingError(path, "has a header but no data lines.")
    width = len(header) if header is not None else len(data[0])
    for i, r in enumerate(data):
        if len(r) != width:
            line = i + 1 + (header is not None)
            raise RecordingError(path, f"has {len(r)} columns on data line {line}, not {width}.")
    t_idx = None if fs_hz is not None and time_column is None else _time_index(path, header, time_column, width)
    start = None
    if t_idx is not None:
        t, start = _times(path, [r[t_idx] for r in data])
        rate = rate_from_times(path, t)
        if fs_hz is not None and abs(rate - fs_hz) > 0.01 * fs_hz:
            raise RecordingError(path, f"has times at {rate:.6g} Hz, not at the {fs_hz:g} Hz given.")
        fs_hz = rate
    assert fs_hz is not None
    channels = []
    for j in range(width):
        if j == t_idx:
            continue
        name, unit = _split_unit(header[j]) if header is not None else (f"column {j + 1}", None)
        values = np.empty(len(data), dtype=np.float64)
        for i, r in enumerate(data):
            v = _number(r[j])
            if v is None:
                line = i + 1 + (header is not None)
                raise RecordingError(path, f"has {r[j]!r}, not a number, on data line {line}, column {j + 1}.")
            values[i] = v
        channels.append(Channel(name, float(fs_hz), values, unit))
    if not channels:
        raise RecordingError(path, "has a time column but no column of samples.")
    return Recording(path, tuple(channels), start)
