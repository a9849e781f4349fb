"""Engines and sessions for the store: SQLite (default) or PostgreSQL through psycopg 3.

SQLite connections get WAL journaling (readers never block the writer), foreign keys on
and a busy timeout; transactions are begun explicitly so SQLAlchemy, not the sqlite3
module, decides where they start and end. ``postgresql://`` URLs are routed to psycopg 3.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

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
        database = parsed.database
        if database and database != ":memory:" and not database.startswith("file:"):
            Path(database).expanduser().parent.mkdir(parents=True, exist_ok=True)
        engine = create_engine(
            parsed, echo=echo, connect_args={"timeout": busy_timeout_ms / 1000.0}
        )
        _sqlite_setup(engine, busy_timeout_ms)
        return engine
    return create_engine(parsed, echo=echo, pool_pre_ping=True)


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

    def close(self) -> None:
        self.engine.dispose()
