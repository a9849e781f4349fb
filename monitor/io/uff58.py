"""Universal File Format data-set 58 ("function at nodal DOF"): measured functions.

A universal file is a sequence of data-sets, each between two lines holding ``-1`` in
columns 1-6, the first line after the opening one giving the data-set number in columns
1-6. Data-set 58 (ASCII) has 11 header records, then the data (layout as published with
the format and as implemented by the open pyuff package, ``pyuff/datasets/dataset_58.py``):

- records 1-5: five 80-character ID lines (ID line 3 is usually the date);
- record 6 ``(2(I5,I10),2(1X,I10,1X,A10,I4))``: function type (1 = time response,
  2 auto spectrum, 3 cross spectrum, 4 frequency response, ...), function id, version,
  load case, response entity name, response node, response direction, reference entity,
  node, direction;
- record 7 ``(3I10,3E13.5)``: ordinate data type (2 real single, 4 real double,
  5 complex single, 6 complex double), number of values, abscissa spacing (1 even,
  0 uneven), abscissa minimum, abscissa increment, z-axis value;
- records 8-11 ``(I10,3I5,2(1X,A20))``: abscissa, ordinate, ordinate denominator and
  z-axis characteristics: specific data type, length, force and temperature unit
  exponents, axis label, axis units label;
- record 12, the values: real single ``6E13.5``, real double ``4E20.12``; uneven
  abscissa: (x, y) pairs, ``2(E13.5,E13.5)`` single or ``2(E13.5,E20.12)`` double.

The binary variant 58b (``58b`` on the number line, followed by byte ordering 1 little /
2 big endian, floating-point format 2 = IEEE 754, number of ASCII header lines, number of
bytes) carries the same 11 header lines, then the values as raw IEEE floats.

Read here: data-sets 58 and 58b of function type 1 (time response) with real ordinates,
even or uneven abscissa (an uneven one must be uniform: it becomes the sample rate); every
other data-set of the file is skipped, a data-set 58 of another function type or with
complex ordinates is refused. Values are read by whitespace, so a writer that keeps to
the field widths and one that separates its fields by a blank both read. The sample rate
is ``1 / increment`` given to the digits of the increment field (``3.33333e-04`` is
3000 Hz, not 3000.003 Hz); of an uneven abscissa, the rate of its times to six digits. An ordinate axis units label that names a known unit (``g``,
``m/s^2``, ``N`` ...) becomes the channel's unit.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from monitor.io.csv_waveform import KNOWN_UNITS
from monitor.io.recording import Channel, Recording, RecordingError, rate_from_times

_FUNCTION_TYPES = {0: "general or unknown", 1: "time response", 2: "auto spectrum", 3: "cross spectrum",
                   4: "frequency response function", 5: "transmissibility", 6: "coherence",
                   7: "auto correlation", 8: "cross correlation", 9: "power spectral density"}
_HEADER_LINES = 11


def _fields(line: bytes) -> list[str]:
    return line.decode("ascii", errors="replace").split()


def rate_from_increment(text: str) -> float:
    """``1 / increment`` with as few significant digits as reproduce the increment field
    ``text`` (``3.33333e-04`` -> 3000.0); the field holds no more precision than that."""
    dx = float(text)
    mantissa = text.strip().lower().split("e")[0].lstrip("+-")
    digits = len(mantissa.replace(".", "").lstrip("0")) or 1
    raw = 1.0 / dx
    for k in range(1, 16):
        cand = float(f"{raw:.{k}g}")
        if f"{1.0 / cand:.{digits - 1}e}" == f"{dx:.{digits - 1}e}":
            return cand
    return raw


def snap_rate(raw_hz: float, rel_tol: float) -> float:
    """``raw_hz`` with the fewest significant digits that stay within ``rel_tol`` of it."""
    for k in range(1, 16):
        cand = float(f"{raw_hz:.{k}g}")
        if abs(cand - raw_hz) <= rel_tol * raw_hz:
            return cand
    return raw_hz


def _blocks(path: Path, data: bytes) -> list[tuple[str, bytes, int]]:
    """(data-set number, body bytes after the number line, its line in the file) of each
    data-set of ``data``."""
    lines = data.splitlines(keepends=True)
    out: list[tuple[str, bytes, int]] = []
    i = 0
    starts = []
    pos = 0
    for ln in lines:
        starts.append(pos)
        pos += len(ln)
    while i < len(lines):
        if lines[i].strip() != b"-1":
            if not out and lines[i].strip():
                raise RecordingError(path, f"does not start with a '-1' delimiter line (line {i + 1}); "
                                           "it is no universal file.")
            i += 1
            continue
        if i + 1 >= len(lines):
            break
        number = _fields(lines[i + 1])
        if not number:
            raise RecordingError(path, f"has no data-set number after the '-1' on line {i + 1}.")
        kind = number[0]
        body_start = starts[i + 1] + len(lines[i + 1])
        if kind.lower() == "58b":
            head = number[1:]
            try:
                n_ascii, n_bytes = int(head[2]), int(head[3])
            except (IndexError, ValueError):
                raise RecordingError(path, f"has a data-set 58b header on line {i + 2} without its line and "
                                           "byte counts.") from None
            end = body_start
            for _ in range(n_ascii):
                nl = data.find(b"\n", end)
                end = nl + 1 if nl >= 0 else len(data)
            body = data[body_start:end + n_bytes]
            if len(data) < end + n_bytes:
                raise RecordingError(path, f"is truncated: data-set 58b at line {i + 2} states {n_bytes} bytes "
                                           f"but the file ends after {len(data) - end}.")
            out.append((kind.lower(), body, i + 2))
            rest = data[end + n_bytes:]
            skip = rest.find(b"-1")
            consumed = end + n_bytes + (skip + 2 if skip >= 0 else len(rest))
            i = next((k for k, s in enumerate(starts) if s >= consumed), len(lines))
            continue
        j = i + 2
        while j < len(lines) and lines[j].strip() != b"-1":
            j += 1
        if j >= len(lines):
            raise RecordingError(path, f"is truncated: data-set {kind} at line {i + 2} has no closing '-1' line.")
        out.append((kind.lower(), b"".join(lines[i + 2:j]), i + 2))
        i = j + 1
    return out


def _dataset(path: Path, body: bytes, binary: bool, line: int, header: list[str]) -> Channel | None:
    hl = body.splitlines(keepends=True)
    if len(hl) < _HEADER_LINES:
        raise RecordingError(path, f"has a data-set 58 at line {line} with {len(hl)} header lines, not 11.")
    rec6, rec7, rec9 = _fields(hl[5]), _fields(hl[6]), hl[8].decode("ascii", errors="replace")
    try:
        func_type = int(rec6[0])
        ord_type, n, even = int(rec7[0]), int(rec7[1]), int(rec7[2])
        x0_text, dx_text = rec7[3], rec7[4]
        float(x0_text), float(dx_text)
    except (IndexError, ValueError):
        raise RecordingError(path, f"has a data-set 58 at line {line} whose records 6 and 7 are not the "
                                   "published layout (function type, data type, count, spacing).") from None
    if func_type != 1:
        raise RecordingError(path, f"holds a {_FUNCTION_TYPES.get(func_type, f'type {func_type}')} (function type "
                                   f"{func_type}) at line {line}, not a time response (type 1).")
    if ord_type not in (2, 4):
        raise RecordingError(path, f"has ordinate data type {ord_type} at line {line}; a waveform needs real "
                                   "values (2 single or 4 double precision).")
    per = 1 if even else 2
    if binary:
        order = "<" if header[:1] == ["1"] else ">"  # byte ordering 1: little endian
        raw = b"".join(hl[_HEADER_LINES:])
        size = 4 if ord_type == 2 else 8
        count = min(len(raw) // size, n * per)
        values = np.frombuffer(raw[:count * size], dtype=f"{order}f{size}").astype(np.float64)
    else:
        try:
            values = np.array(b" ".join(hl[_HEADER_LINES:]).split(), dtype=np.float64)
        except ValueError:
            raise RecordingError(path, f"has a value that is not a number in data-set 58 at line {line}.") from None
    if values.size != n * per:
        raise RecordingError(path, f"states {n} values in data-set 58 at line {line} but holds "
                                   f"{values.size // per}.")
    if n < 2:
        raise RecordingError(path, f"has fewer than two values in data-set 58 at line {line}.")
    if even:
        fs = rate_from_increment(dx_text)
        samples = values
    else:
        # The abscissa is written E13.5 (six digits) in every variant: the span holds
        # no more than that.
        fs = snap_rate(rate_from_times(path, values[0::2], f"the abscissa of data-set 58 at line {line}"),
                       5e-6)
        samples = values[1::2]
    label = rec9[47:67].strip()  # (I10,3I5,1X,A20,1X,A20): the units label
    unit = label if label in KNOWN_UNITS else None
    name = f"node {rec6[5]} dir {rec6[6]}" if len(rec6) > 6 else f"data-set at line {line}"
    return Channel(name, fs, np.ascontiguousarray(samples), unit)


def read_uff58(path: Path) -> Recording:
    """The time responses of universal file ``path``, one channel per data-set 58/58b, in
    file order; RecordingError naming the file when it is no universal file, a data-set
    58 is not a real time response or is cut short, or there is none."""
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise RecordingError(path, f"cannot be read ({exc.strerror}).") from None
    if not data.strip():
        raise RecordingError(path, "is empty.")
    channels = []
    for kind, body, line in _blocks(path, data):
        if kind in ("58", "58b"):
            head = _fields(data.splitlines()[line - 1])[1:] if kind == "58b" else []
            ch = _dataset(path, body, kind == "58b", line, head)
            if ch is not None:
                channels.append(ch)
    if not channels:
        raise RecordingError(path, "holds no data-set 58 (measured function).")
    return Recording(path, tuple(channels))
