"""Engines and sessions for the store: SQLite (default) or PostgreSQL through psycopg 3.

SQLite connections get WAL journaling (readers never block the writer), foreign keys on
and a busy timeout; transactions are begun explicitly so SQLAlchemy, not the sqlite3
module, decides where they start and end. ``postgresql://`` URLs are routed to psycopg 3.
"""

from __future__ import annotations

import fcntl
import json
import os
from collections.abc import Iterator
from contextlib import contextmanager, nullcontext
from pathlib import Path
from typing import Any

import orjson
from sqlalchemy import Engine, create_engine, event, inspect
from sqlalchemy.engine import make_url
from sqlalchemy.engine.url import URL
from sqlalchemy.exc import ArgumentError
from sqlalchemy.orm import Session, sessionmaker

DEFAULT_BUSY_TIMEOUT_MS = 10_000


class StoreError(RuntimeError):
    """The store cannot be used as asked (bad URL, schema missing, ...); one sentence."""


def normalise_url(url: str | URL) -> URL:
    """Parse ``url``; ``postgresql://`` and ``postgres://`` go to the psycopg 3 driver."""
    text = str(url) if isinstance(url, URL) else url
    if isinstance(text, str) and text.startswith("postgres://"):
        text = "postgresql://" + text[len("postgres://") :]
    try:
        parsed = make_url(text)
    except ArgumentError as exc:
        raise StoreError(f"database URL {text!r} is not a valid SQLAlchemy URL.") from exc
    if parsed.drivername == "postgresql":
        parsed = parsed.set(drivername="postgresql+psycopg")
    if parsed.get_backend_name() not in ("sqlite", "postgresql"):
        raise StoreError(
            f"database URL {parsed.render_as_string(hide_password=True)!r} names an "
            "unsupported database; use sqlite:/// or postgresql+psycopg://."
        )
    return parsed


def make_engine(
    url: str | URL, *, busy_timeout_ms: int = DEFAULT_BUSY_TIMEOUT_MS, echo: bool = False
) -> Engine:
    """Create an engine for ``url`` with the store's connection settings."""
    parsed = normalise_url(url)
    if parsed.get_backend_name() == "sqlite":
        path = _sqlite_file(parsed)
        if path is not None:
            path.parent.mkdir(parents=True, exist_ok=True)
        engine = create_engine(
            parsed, echo=echo, connect_args={"timeout": busy_timeout_ms / 1000.0},
            json_serializer=dumps_json, json_deserializer=orjson.loads,
        )
        _sqlite_setup(engine, busy_timeout_ms)
        return engine
    return create_engine(parsed, echo=echo, pool_pre_ping=True, json_serializer=dumps_json,
                         json_deserializer=orjson.loads)


# numpy scalars and arrays serialised as numbers and lists; dataclasses and datetimes
# refused (TypeError), so that they take jsonable's forms, as they always have.
_ORJSON_OPTIONS = orjson.OPT_SERIALIZE_NUMPY | orjson.OPT_PASSTHROUGH_DATACLASS | orjson.OPT_PASSTHROUGH_DATETIME


def dumps_json(value: Any) -> str:
    """JSON text of a JSON column's value: plain data and numpy values go straight to
    orjson; anything else (dataclasses, dates, non-string keys) goes through
    :func:`monitor.store.writes.jsonable` first.

    Non-finite numbers become null: JSON has none, and PostgreSQL's json type refuses
    the ``NaN``/``Infinity`` tokens. The text is always standard JSON, but a null cannot
    be told from None: data that must come back exactly (the detector state) tags them
    itself before it gets here (:mod:`monitor.state_json`, docs/store.md).

    Callers may hand over a reading's evaluation as it is: the serialisation itself is
    the check, not a second walk over the data. orjson, not the json module: a reading's
    rows carry 3-4 kB of JSON, which json.dumps wrote in 0.077 ms per message and orjson
    writes in 0.010 ms (measured in one run: 7 % of the service's 1.0 ms per message)."""
    try:
        return orjson.dumps(value, option=_ORJSON_OPTIONS).decode()
    except TypeError:
        from monitor.store.writes import jsonable  # writes imports this module

        data = jsonable(value)
    try:
        return orjson.dumps(data, option=_ORJSON_OPTIONS).decode()
    except TypeError:  # an integer beyond 64 bits, which only the json module writes
        return json.dumps(data, allow_nan=False)


def _sqlite_setup(engine: Engine, busy_timeout_ms: int) -> None:
    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_connection: Any, _record: Any) -> None:
        # Let SQLAlchemy emit BEGIN itself (the sqlite3 module's implicit transactions
        # would otherwise run PRAGMAs and SAVEPOINTs outside of them).
        dbapi_connection.isolation_level = None
        cur = dbapi_connection.cursor()
        cur.execute("PRAGMA journal_mode=WAL")
        cur.execute("PRAGMA foreign_keys=ON")
        cur.execute(f"PRAGMA busy_timeout={int(busy_timeout_ms)}")
        cur.execute("PRAGMA synchronous=NORMAL")
        cur.close()

    @event.listens_for(engine, "begin")
    def _on_begin(conn: Any) -> None:
        conn.exec_driver_sql("BEGIN")


def session_factory(engine: Engine) -> sessionmaker[Session]:
    """A sessionmaker whose objects stay readable after commit."""
    return sessionmaker(engine, expire_on_commit=False)


def has_schema(engine: Engine) -> bool:
    """True when the store's tables exist (``whirlwatch db upgrade`` has run)."""
    return inspect(engine).has_table("measurements")


def require_schema(engine: Engine) -> None:
    """Raise :class:`StoreError` when the schema is missing, saying how to create it."""
    if not has_schema(engine):
        shown = engine.url.render_as_string(hide_password=True)
        raise StoreError(
            f"database {shown} has no whirlwatch tables; run `whirlwatch db upgrade --database {shown}` first."
        )


class Store:
    """An engine and its session factory: what the service and the dashboard hold.

    >>> store = Store.open("sqlite:///data/whirlwatch.sqlite")   # doctest: +SKIP
    >>> with store.transaction() as session:                    # doctest: +SKIP
    ...     write_reading(session, analysis)                     # committed on exit
    """

    def __init__(self, engine: Engine) -> None:
        self.engine = engine
        self.sessions = session_factory(engine)
        self._gate_path = _writer_gate_path(engine)
        self._gate_fd: int | None = None

    @classmethod
    def open(
        cls, url: str | URL, *, busy_timeout_ms: int = DEFAULT_BUSY_TIMEOUT_MS, check: bool = True
    ) -> Store:
        """Open the store at ``url``; with ``check``, fail unless the schema exists."""
        store = cls(make_engine(url, busy_timeout_ms=busy_timeout_ms))
        if check:
            try:
                require_schema(store.engine)
            except Exception:
                store.close()
                raise
        return store

    def session(self) -> Session:
        """A new session (the caller closes it, e.g. ``with store.session() as s:``)."""
        return self.sessions()

    @contextmanager
    def transaction(self) -> Iterator[Session]:
        """One transaction: committed when the block ends, rolled back on an exception."""
        with self.sessions() as session, session.begin():
            yield session

    @contextmanager
    def write_transaction(self) -> Iterator[Session]:
        """:meth:`transaction` for a writer that reads before it writes (the service, a
        recorded test): queued at :meth:`writer_gate`, and on SQLite holding the
        database's write lock from the start.

        A SQLite transaction that reads and then writes cannot wait for the lock: if
        another process committed since its first read, SQLite fails the write at once with
        "database is locked". A write that matches no row takes the lock before any read,
        so the wait is the busy handler's. (PostgreSQL serialises such writers on row locks
        taken by their own queries instead.)"""
        with self.writer_gate(), self.transaction() as session:
            if self.engine.dialect.name == "sqlite":
                # Straight on the driver's connection: through SQLAlchemy this no-op costs
                # several times what SQLite spends on it.
                session.connection().connection.driver_connection.execute(
                    "UPDATE detector_state SET machine_id = machine_id WHERE 0")
            yield session

    def writer_gate(self) -> Any:
        """A context that queues this process's writers behind the other processes' on a
        SQLite file (an exclusive ``flock`` on ``<database>.writers``); a null context for
        PostgreSQL and in-memory SQLite.

        SQLite's busy handler polls for its lock with sleeps that grow from 1 ms to 100 ms,
        so a writer that finds the lock taken wakes up long after it was released; two
        service processes then spend much of their time asleep. Waiting on the file lock
        wakes a writer as soon as the other one is done. It only decides who goes next:
        SQLite's own lock still guards the data, for writers that do not take the gate
        (the dashboard, the command line) as before.
        """
        if self._gate_path is None:
            return nullcontext()
        return self._gate()

    @contextmanager
    def _gate(self) -> Iterator[None]:
        if self._gate_fd is None:
            self._gate_fd = os.open(self._gate_path, os.O_RDWR | os.O_CREAT, 0o644)
        fcntl.flock(self._gate_fd, fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(self._gate_fd, fcntl.LOCK_UN)

    def close(self) -> None:
        if self._gate_fd is not None:
            os.close(self._gate_fd)
            self._gate_fd = None
        self.engine.dispose()


def _sqlite_file(url: URL) -> Path | None:
    """The database file of a SQLite ``url``; None for an in-memory or ``file:`` URI
    database."""
    database = url.database
    if not database or database == ":memory:" or database.startswith("file:"):
        return None
    return Path(database).expanduser()


def _writer_gate_path(engine: Engine) -> str | None:
    """``<database>.writers`` beside a SQLite database file; None otherwise."""
    if engine.dialect.name != "sqlite":
        return None
    path = _sqlite_file(engine.url)
    return None if path is None else str(path) + ".writers"
