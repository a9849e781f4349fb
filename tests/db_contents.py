"""Every row of every table of a store, for comparing two databases table by table
(backup round trips, upgrades): read through reflected tables, so it sees what is in the
database whatever the models say."""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping, Sequence
from typing import Any

from sqlalchemy import MetaData, select

from monitor.store.db import make_engine

#: Alembic's own table: its one row is the schema revision, compared on its own.
VERSION_TABLE = "alembic_version"


def _value(v: Any) -> Any:
    """A value that compares and sorts the same from SQLite and PostgreSQL."""
    if isinstance(v, dt.datetime):
        return (v if v.tzinfo is None else v.astimezone(dt.UTC).replace(tzinfo=None)).isoformat()
    if isinstance(v, memoryview):
        return bytes(v)
    if isinstance(v, dict | list):
        return repr(v)
    return v


def table_rows(url: str, *, skip: tuple[str, ...] = (VERSION_TABLE,),
               columns: Mapping[str, Sequence[str]] | None = None) -> dict[str, list[tuple]]:
    """``{table: sorted rows}`` of every table at ``url`` but ``skip``; each row a tuple of
    its columns in the table's order, or of ``columns[table]`` only when given (the
    columns an older revision had: what an upgrade must keep)."""
    engine = make_engine(url)
    try:
        meta = MetaData()
        meta.reflect(engine)
        out: dict[str, list[tuple]] = {}
        with engine.connect() as conn:
            for name, tbl in meta.tables.items():
                if name in skip:
                    continue
                cols = [tbl.c[c] for c in columns[name]] if columns and name in columns else list(tbl.c)
                rows = [tuple(_value(v) for v in r) for r in conn.execute(select(*cols))]
                out[name] = sorted(rows, key=repr)
        return out
    finally:
        engine.dispose()


def table_columns(url: str) -> dict[str, list[str]]:
    """``{table: column names in order}`` of every table at ``url``."""
    engine = make_engine(url)
    try:
        meta = MetaData()
        meta.reflect(engine)
        return {name: [c.name for c in tbl.c] for name, tbl in meta.tables.items()}
    finally:
        engine.dispose()


def row_counts(contents: dict[str, list[tuple]]) -> dict[str, int]:
    """``{table: rows}`` of :func:`table_rows`' result."""
    return {name: len(rows) for name, rows in contents.items()}
