"""Exact JSON for detector state: every float comes back with the bits it was written with.

JSON has no NaN or infinities (RFC 8259, section 6), PostgreSQL's ``json`` type refuses the
``NaN``/``Infinity`` tokens some writers emit, and the store's serialiser writes them as
``null``, which cannot be told from a missing value. Detector state holds such values
(a Theil-Sen interval over tied values is NaN), so its snapshots write them as tagged
strings (format :data:`STATE_FORMAT`, docs/store.md):

==========================  ======================================================
``"!nan"``                  the quiet NaN with bits ``0x7ff8000000000000``
``"!nan:<16 hex digits>"``  any other NaN, by its IEEE 754 binary64 bits
``"!inf"``, ``"!-inf"``     positive and negative infinity
==========================  ======================================================

Finite floats, ``-0.0`` included, stay JSON numbers (shortest round-trip form, so the
same bits come back). In free-form data (alarm evidence), a string beginning with ``!``
gets one more ``!`` in front (``"!x"`` is written ``"!!x"``), so no string is mistaken
for a tag.

The ``*_out`` functions make JSON data; the ``*_in`` functions read it back, and raise
ValueError for a string that is neither a tag nor (in free-form data) an escaped string.
"""

from __future__ import annotations

import dataclasses
import math
import struct
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

from monitor.model.jsonsafe import jsonable

#: Format of a detector-state snapshot written by this code (docs/store.md). Format 1
#: (snapshots without a ``format`` key) wrote NaN and infinities as ``null``.
STATE_FORMAT = 2

TAG = "!"
_QUIET_NAN_BITS = 0x7FF8000000000000
_FROM_TAG = {"!nan": math.nan, "!inf": math.inf, "!-inf": -math.inf}


def _bits(x: float) -> int:
    return struct.unpack("<Q", struct.pack("<d", x))[0]


def _tag(x: float) -> str:
    """The tag of a non-finite float."""
    if x == math.inf:
        return "!inf"
    if x == -math.inf:
        return "!-inf"
    b = _bits(x)
    return "!nan" if b == _QUIET_NAN_BITS else f"!nan:{b:016x}"


def _untag(text: str) -> float:
    v = _FROM_TAG.get(text)
    if v is not None:
        return v
    if text.startswith("!nan:") and len(text) == 21:
        try:
            x = struct.unpack("<d", struct.pack("<Q", int(text[5:], 16)))[0]
        except (ValueError, struct.error):
            pass
        else:
            if math.isnan(x):
                return x
    raise ValueError(f"state value {text!r} is not a number or a non-finite tag (!nan, !inf, !-inf).")


def float_out(x: float | None) -> float | str | None:
    """A number (or None) as exact JSON data: itself when finite, its tag otherwise
    (an int stays an int)."""
    if x is None or type(x) is int:
        return x
    x = float(x)
    return x if math.isfinite(x) else _tag(x)


def float_in(v: Any) -> float | None:
    """Read back :func:`float_out`'s data (None stays None, an int stays an int)."""
    if v is None or type(v) is float or type(v) is int:
        return v
    if isinstance(v, str):
        return _untag(v)
    raise ValueError(f"state value {v!r} is not a number.")


def floats_out(xs: Iterable[float]) -> list[float | str]:
    """A list of floats as exact JSON data (see :func:`float_out`)."""
    out: list[Any] = list(xs)  # floats, or whatever the caller kept (tagged below)
    # A finite sum means every term is finite (NaN and infinities carry through a sum):
    # one pass in C for the common case.
    try:
        if math.isfinite(sum(out)):
            return out
    except TypeError:
        pass
    return [float_out(x) for x in out]  # type: ignore[misc]


def number_in(v: Any, field: str) -> float:
    """Read back :func:`float_out`'s data where a number belongs; ValueError naming
    ``field`` for null."""
    x = float_in(v)
    if x is None:
        raise ValueError(f"state value {field!r} is null where a number belongs.")
    return x


def floats_in(vs: Sequence[Any]) -> list[float]:
    """Read back :func:`floats_out`'s data as floats; None is refused."""
    out = []
    for v in vs:
        x = float_in(v)
        if x is None:
            raise ValueError("state list holds null where only numbers belong.")
        out.append(x)
    return out


def value_out(obj: Any) -> Any:
    """Free-form JSON data (alarm evidence) with exact floats and escaped strings:
    mappings (keys as strings), lists and tuples, strings, numbers, booleans and None;
    numpy values by their Python equivalents, dataclasses as mappings of their fields;
    other objects as :func:`monitor.model.jsonsafe.jsonable` writes them."""
    t = type(obj)
    if t is float:
        return obj if math.isfinite(obj) else _tag(obj)
    if t is str:
        return TAG + obj if obj.startswith(TAG) else obj
    if obj is None or t is int or t is bool:
        return obj
    if isinstance(obj, Mapping):
        return {k if type(k) is str else str(k): value_out(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [value_out(v) for v in obj]
    if isinstance(obj, float):  # numpy float64 and other float subclasses
        return value_out(float(obj))
    if isinstance(obj, str):
        return value_out(str(obj))
    if isinstance(obj, bool):
        return bool(obj)
    if isinstance(obj, int):
        return int(obj)
    tolist = getattr(obj, "tolist", None)  # numpy arrays and scalars
    if callable(tolist):
        return value_out(tolist())
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return {f.name: value_out(getattr(obj, f.name)) for f in dataclasses.fields(obj)}
    # Anything else (a date, an enum) in the form the store gives it.

    return value_out(jsonable(obj))


def value_in(obj: Any) -> Any:
    """Read back :func:`value_out`'s data."""
    t = type(obj)
    if t is str:
        if not obj.startswith(TAG):
            return obj
        return obj[1:] if obj.startswith(TAG + TAG) else _untag(obj)
    if t is dict:
        return {k: value_in(v) for k, v in obj.items()}
    if t is list:
        return [value_in(v) for v in obj]
    return obj


def upgrade_snapshot(data: Mapping[str, Any]) -> Mapping[str, Any]:
    """A :meth:`~monitor.detection.evaluator.MachineEvaluator.snapshot` of any format in
    the current one (:data:`STATE_FORMAT`); a current one is returned as it is.

    Format 1 (no ``format`` key) was written through the store's JSON serialiser, which
    turns NaN and infinities into ``null``. Where a ``null`` can only have been a
    non-finite float it is read as NaN (the only non-finite value the code puts there):

    - ``trends[*].fit``: slope, interval ends and fitted value (the interval ends are NaN
      when a window's values are all tied);
    - ``baselines[*].speeds``: a running speed the analysis gave as NaN.

    Everywhere else a ``null`` is read as None, a value those fields hold in their own
    right: a window's ``ref_speed`` (no reference yet) and ``speed_band`` (a speed-free
    feature), a baseline's ``started_at``, an alarm's times, a stream's ``last_ts``, and
    any evidence value. ``fit_ts`` null is read as 0.0 (its value before any fit). Fields
    that hold finite numbers only (window times and values, baseline values, the speed
    history, reading times and intervals) cannot hold ``null``; a snapshot where they do
    is refused (ValueError naming the machine and the field). Evidence strings are
    escaped as the current format writes them.
    """
    fmt = data.get("format", 1)
    if fmt == STATE_FORMAT:
        return data
    machine = data.get("machine")
    if fmt != 1:
        raise ValueError(f"snapshot of machine {machine!r} has format {fmt!r}; this version reads "
                         f"formats 1 to {STATE_FORMAT}.")

    def finite_only(values: Any, field: str) -> Any:
        if any(v is None for v in values):
            raise ValueError(f"snapshot of machine {machine!r} (format 1): {field!r} holds null "
                             "where only finite numbers belong.")
        return values

    nan = float_out(math.nan)
    out = dict(data, format=STATE_FORMAT)
    trends = []
    for p, f, w in data.get("trends", []):
        w = dict(w)
        finite_only(w.get("ts", []), f"trends {p}/{f} ts")
        finite_only(w.get("values", []), f"trends {p}/{f} values")
        if w.get("fit") is not None:
            w["fit"] = [nan if v is None else v for v in w["fit"][:4]] + list(w["fit"][4:])
        if w.get("fit_ts", 0.0) is None:
            w["fit_ts"] = 0.0
        trends.append([p, f, w])
    out["trends"] = trends
    baselines = []
    for p, f, b in data.get("baselines", []):
        b = dict(b)
        finite_only(b.get("values", []), f"baselines {p}/{f} values")
        b["speeds"] = [nan if v is None else v for v in b.get("speeds", [])]
        baselines.append([p, f, b])
    out["baselines"] = baselines
    engine = dict(data["engine"])
    streams = []
    for st in engine.get("streams", []):
        st = dict(st)
        if st.get("alarm"):
            st["alarm"] = dict(st["alarm"], evidence=value_out(st["alarm"].get("evidence") or {}))
        streams.append(st)
    engine["streams"] = streams
    out["engine"] = engine
    for x in data.get("speed", []):
        finite_only(x, "speed")
    finite_only(data.get("last_ts", {}).values(), "last_ts")
    for p, v in data.get("intervals", {}).items():
        finite_only(v, f"intervals {p}")
    return out
