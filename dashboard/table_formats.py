"""Tables (monitor/store/reads/exports.py) written as CSV or Parquet for the export routes.

Both formats are written by pyarrow from one Arrow table, so they hold the same values:
floats as stored (amplitudes float32, everything else float64; CSV writes each number in
the shortest form that reads back to the same value), empty cells (CSV) or nulls
(Parquet) where a reading has no value. ``time_utc`` is an ISO 8601 UTC text in CSV
(``2026-03-02T03:10:00Z``) and a ``timestamp[us, UTC]`` in Parquet. Text cells are ids
and short words of the registry's id alphabet (docs/registry.md), so no cell can start a
spreadsheet formula.
"""

from __future__ import annotations

import datetime as dt
import io
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.csv as pa_csv
import pyarrow.parquet as pq

from monitor.model.timefmt import iso_utc

#: Export format -> media type (Parquet: the type registered with IANA in 2024).
MEDIA_TYPES = {"csv": "text/csv", "parquet": "application/vnd.apache.parquet"}
FORMATS = tuple(MEDIA_TYPES)


def _array(values: Any) -> pa.Array:
    if isinstance(values, np.ndarray):
        return pa.array(values, from_pandas=True)  # NaN -> null (an empty cell)
    if values and isinstance(values[0], dt.datetime):
        return pa.array(values, type=pa.timestamp("us", tz="UTC"))
    return pa.array(values)


def arrow_table(columns: dict[str, Any]) -> pa.Table:
    """The Arrow table of ``columns`` (name -> list or numpy array, all of one length)."""
    return pa.table({name: _array(values) for name, values in columns.items()})


def encode(columns: dict[str, Any], fmt: str) -> bytes:
    """``columns`` as the bytes of a CSV (header row, RFC 4180 quoting) or Parquet file."""
    if fmt == "csv":
        shown = dict(columns)
        if "time_utc" in shown:
            shown["time_utc"] = [iso_utc(t) for t in shown["time_utc"]]
        table = arrow_table(shown)
        buf = io.BytesIO()
        pa_csv.write_csv(table, buf, pa_csv.WriteOptions(include_header=True))
        return buf.getvalue()
    if fmt == "parquet":
        buf = io.BytesIO()
        pq.write_table(arrow_table(columns), buf, compression="zstd")
        return buf.getvalue()
    raise ValueError(f"format {fmt!r} is not one of {', '.join(FORMATS)}")
