"""JSON-ready data from the project's values: one conversion for the store, the API and the
command line.

JSON (RFC 8259) has no NaN or infinity: a non-finite float becomes null here. Where a value
must come back exactly (the detector state), :mod:`monitor.detection.state_json` tags
non-finite floats instead of dropping them.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import enum
import math
from collections.abc import Iterable, Mapping
from typing import Any

import numpy as np

_DATACLASS_FIELDS: dict[type, tuple[str, ...]] = {}


def jsonable(obj: Any) -> Any:
    """Turn dataclasses, numpy values, tuples, dates and enums into JSON data.

    Non-finite floats become None (JSON has no NaN); mapping keys become strings.
    """
    # The common plain types first, by exact type: this runs on every stored reading.
    t = type(obj)
    if t is float:
        return obj if math.isfinite(obj) else None
    if t is str or t is int or t is bool or obj is None:
        return obj
    if t is dict:
        return {k if type(k) is str else str(k): jsonable(v) for k, v in obj.items()}
    if t is list or t is tuple:
        return [jsonable(x) for x in obj]
    names = _DATACLASS_FIELDS.get(t)
    if names is None and dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        names = _DATACLASS_FIELDS[t] = tuple(f.name for f in dataclasses.fields(obj))
    if names is not None:
        return {n: jsonable(getattr(obj, n)) for n in names}
    if obj is None or isinstance(obj, bool | str | int):
        return obj
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, np.generic):
        return jsonable(obj.item())
    if isinstance(obj, np.ndarray):
        return [jsonable(x) for x in obj.tolist()]
    if isinstance(obj, enum.Enum):
        return jsonable(obj.value)
    if isinstance(obj, dt.datetime | dt.date):
        return obj.isoformat()
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return {f.name: jsonable(getattr(obj, f.name)) for f in dataclasses.fields(obj)}
    if isinstance(obj, Mapping):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, Iterable):
        return [jsonable(x) for x in obj]
    return str(obj)
