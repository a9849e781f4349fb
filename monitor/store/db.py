"""Engines and sessions for the store: SQLite (default) or PostgreSQL through psycopg 3.

SQLite connections get WAL journaling (readers never block the writer), foreign keys on
and a busy timeout; transactions are begun explicitly so SQLAlchemy, not the sqlite3
module, decides where they start and end. ``postgresql://`` URLs are routed to psycopg 3.

PostgreSQL connections never wait without bound (docs/service.md, "Health"): connecting
gives up after :data:`PG_CONNECT_TIMEOUT_S`, TCP keepalives and ``tcp_user_timeout``
notice a dead network path, and an engine made with ``silence_limit_s`` (the service's)
has a :class:`SilenceWatchdog` that closes a connection whose statement, commit or ping
has had no answer for that long, so the caller gets an error it can retry instead of a
thread that hangs in silence.
"""

from __future__ import annotations

import fcntl
import json
import logging
import os
import re
import socket
import threading
import time
import weakref
from collections.abc import Iterator
from contextlib import contextmanager, nullcontext
from pathlib import Path
from typing import Any

import orjson
from sqlalchemy import Connection, Engine, create_engine, event, inspect
from sqlalchemy.engine import make_url
from sqlalchemy.engine.url import URL
from sqlalchemy.exc import ArgumentError, DisconnectionError
from sqlalchemy.orm import Session, sessionmaker

from monitor.model.jsonsafe import jsonable

log = logging.getLogger("whirlwatch.store")

DEFAULT_BUSY_TIMEOUT_MS = 10_000

#: libpq ``connect_timeout``: longest wait for a PostgreSQL connection to be set up, s.
PG_CONNECT_TIMEOUT_S = 10
#: TCP keepalive of PostgreSQL connections (libpq ``keepalives_*``): first probe after this
#: many idle seconds, then every ``_INTERVAL_S``, the connection dropped after ``_COUNT``
#: unanswered probes; ``tcp_user_timeout`` (Linux, ms) drops it when sent data stays
#: unacknowledged that long. Together they notice a dead network path within about 30 s.
PG_KEEPALIVE_IDLE_S = 10
PG_KEEPALIVE_INTERVAL_S = 5
PG_KEEPALIVE_COUNT = 3
PG_TCP_USER_TIMEOUT_MS = 30_000


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


def redact(text: str) -> str:
    """``text`` with the passwords of any database or broker URLs and libpq ``password=``
    settings in it replaced by ``***`` (for logs and error messages)."""
    text = _URL_PASSWORD.sub(r"\1***@", text)
    return _DSN_PASSWORD.sub(r"\1***", text)


_URL_PASSWORD = re.compile(r"(\w[\w+.-]*://[^:/@\s]*:)[^@\s]*@")
_DSN_PASSWORD = re.compile(r"(password\s*=\s*)('[^']*'|\S+)", re.IGNORECASE)


def pg_connect_args(url: URL) -> dict[str, Any]:
    """libpq settings that bound every wait on the network (see the module docstring);
    any the URL sets itself are left as the URL says."""
    defaults: dict[str, Any] = {
        "connect_timeout": PG_CONNECT_TIMEOUT_S,
        "keepalives": 1,
        "keepalives_idle": PG_KEEPALIVE_IDLE_S,
        "keepalives_interval": PG_KEEPALIVE_INTERVAL_S,
        "keepalives_count": PG_KEEPALIVE_COUNT,
        "tcp_user_timeout": PG_TCP_USER_TIMEOUT_MS,
    }
    return {k: v for k, v in defaults.items() if k not in url.query}


def make_engine(
    url: str | URL, *, busy_timeout_ms: int = DEFAULT_BUSY_TIMEOUT_MS, echo: bool = False,
    silence_limit_s: float | None = None,
) -> Engine:
    """Create an engine for ``url`` with the store's connection settings.

    ``silence_limit_s`` (PostgreSQL only): close a connection whose statement, commit or
    ping has had no answer for this many seconds (:class:`SilenceWatchdog`); None leaves
    long statements alone (migrations, the command line)."""
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
    if silence_limit_s is None:
        return create_engine(parsed, echo=echo, pool_pre_ping=True, json_serializer=dumps_json,
                             json_deserializer=orjson.loads, connect_args=pg_connect_args(parsed))
    # The watchdog pings a connection itself at checkout (SQLAlchemy's pre-ping would wait
    # unwatched on a silent connection).
    engine = create_engine(parsed, echo=echo, json_serializer=dumps_json,
                           json_deserializer=orjson.loads, connect_args=pg_connect_args(parsed))
    _WATCHDOGS[engine] = SilenceWatchdog(engine, silence_limit_s)
    return engine


def watchdog_of(engine: Engine) -> SilenceWatchdog | None:
    """The :class:`SilenceWatchdog` of an engine made with ``silence_limit_s``, else None."""
    return _WATCHDOGS.get(engine)


_WATCHDOGS: weakref.WeakKeyDictionary[Engine, SilenceWatchdog] = weakref.WeakKeyDictionary()


class SilenceWatchdog:
    """Closes a PostgreSQL connection that has waited ``limit_s`` seconds for an answer.

    A peer that neither answers nor closes (a hung server, a dead path behind a proxy
    that still accepts TCP) leaves libpq waiting for ever: TCP keepalives are answered by
    whatever holds the socket, and a server-side ``statement_timeout`` never reaches a
    server that does not get the statement. So the engine's statements, commits,
    rollbacks and checkout pings are timed; one still waiting after ``limit_s`` has its
    socket shut down from this thread, which wakes the waiting thread with an
    ``OperationalError`` (a disconnect SQLAlchemy invalidates) that the caller retries.
    Logged once per connection closed, the URL without its password.

    A statement may ask for a longer limit with the execution option
    ``silence_limit_s`` (retention's deletes on a large table).
    """

    POLL_S = 0.5

    def __init__(self, engine: Engine, limit_s: float) -> None:
        if not limit_s > 0:
            raise ValueError(f"silence_limit_s must be a positive number of seconds, got {limit_s!r}.")
        self.limit_s = float(limit_s)
        self.url = engine.url.render_as_string(hide_password=True)
        self._lock = threading.Lock()
        self._waiting: dict[int, tuple[float, float, Any]] = {}  # id -> (since, limit, dbapi conn)
        self.closed = 0
        self._stopped = threading.Event()
        event.listen(engine, "before_cursor_execute", self._before_execute)
        event.listen(engine, "after_cursor_execute", self._after_execute)
        event.listen(engine, "handle_error", self._on_error)
        event.listen(engine, "commit", self._on_end)
        event.listen(engine, "rollback", self._on_end)
        event.listen(engine.pool, "checkout", self._ping)
        event.listen(engine.pool, "reset", self._on_reset)
        event.listen(engine.pool, "checkin", self._on_checkin)
        self._thread = threading.Thread(target=self._watch, name="db-silence-watchdog", daemon=True)
        self._thread.start()

    # -- marks

    def _mark(self, dbapi_conn: Any, limit_s: float | None = None) -> None:
        if dbapi_conn is not None:
            with self._lock:
                self._waiting[id(dbapi_conn)] = (time.monotonic(), limit_s or self.limit_s, dbapi_conn)

    def _clear(self, dbapi_conn: Any) -> None:
        if dbapi_conn is not None:
            with self._lock:
                self._waiting.pop(id(dbapi_conn), None)

    @staticmethod
    def _dbapi(conn: Any) -> Any:
        try:
            return conn.connection.dbapi_connection
        except Exception:  # an invalidated connection has none
            return None

    def _before_execute(self, conn: Any, _cur: Any, _stmt: Any, _params: Any, context: Any, _many: Any) -> None:
        limit = context.execution_options.get("silence_limit_s") if context is not None else None
        self._mark(self._dbapi(conn), limit)

    def _after_execute(self, conn: Any, *_a: Any) -> None:
        self._clear(self._dbapi(conn))

    def _on_error(self, ctx: Any) -> None:
        if ctx.connection is not None:
            self._clear(self._dbapi(ctx.connection))

    def _on_end(self, conn: Any) -> None:
        # Fired before COMMIT/ROLLBACK is sent; the mark ends at the next statement or
        # when the connection goes back to the pool.
        self._mark(self._dbapi(conn))

    def _on_reset(self, dbapi_conn: Any, _record: Any, _reset_state: Any) -> None:
        self._mark(dbapi_conn)

    def _on_checkin(self, dbapi_conn: Any, _record: Any) -> None:
        self._clear(dbapi_conn)

    def _ping(self, dbapi_conn: Any, _record: Any, _proxy: Any) -> None:
        """A pooled connection is checked before use (SQLAlchemy's documented pessimistic
        disconnect handling); a failed check makes the pool try a fresh connection."""
        self._mark(dbapi_conn)
        try:
            cur = dbapi_conn.cursor()
            try:
                cur.execute("SELECT 1")
            finally:
                cur.close()
        except Exception as exc:
            raise DisconnectionError(redact(f"{type(exc).__name__}: {exc}")) from exc
        finally:
            self._clear(dbapi_conn)

    # -- the watching thread

    def stop(self) -> None:
        """End the watching thread (the engine is being disposed of)."""
        self._stopped.set()

    def _watch(self) -> None:
        while not self._stopped.wait(self.POLL_S):
            now = time.monotonic()
            with self._lock:
                late = [(k, since, conn) for k, (since, limit, conn) in self._waiting.items()
                        if now - since > limit]
                for k, *_ in late:
                    self._waiting.pop(k, None)
            for _k, since, conn in late:
                self._close(conn, now - since)

    def _close(self, dbapi_conn: Any, waited_s: float) -> None:
        fd = -1
        try:
            fd = dbapi_conn.pgconn.socket
            dup = socket.socket(fileno=os.dup(fd))
        except Exception:  # closed meanwhile: nothing waits on it any more
            return
        self.closed += 1
        try:
            dup.shutdown(socket.SHUT_RDWR)
        except OSError:
            pass
        finally:
            dup.close()
        log.warning("database connection silent; closed it", extra={
            "database": self.url, "waited_s": round(waited_s, 1), "limit_s": self.limit_s})


# numpy scalars and arrays serialised as numbers and lists; dataclasses and datetimes
# refused (TypeError), so that they take jsonable's forms, as they always have.
_ORJSON_OPTIONS = orjson.OPT_SERIALIZE_NUMPY | orjson.OPT_PASSTHROUGH_DATACLASS | orjson.OPT_PASSTHROUGH_DATETIME


def dumps_json(value: Any) -> str:
    """JSON text of a JSON column's value: plain data and numpy values go straight to
    orjson; anything else (dataclasses, dates, non-string keys) goes through
    :func:`monitor.model.jsonsafe.jsonable` first.

    Non-finite numbers become null: JSON has none, and PostgreSQL's json type refuses
    the ``NaN``/``Infinity`` tokens. The text is always standard JSON, but a null cannot
    be told from None: data that must come back exactly (the detector state) tags them
    itself before it gets here (:mod:`monitor.detection.state_json`, docs/store.md).

    Callers may hand over a reading's evaluation as it is: the serialisation itself is
    the check, not a second walk over the data. orjson, not the json module: a reading's
    rows carry 3-4 kB of JSON, which json.dumps wrote in 0.077 ms per message and orjson
    writes in 0.010 ms (measured in one run: 7 % of the service's 1.0 ms per message)."""
    try:
        return orjson.dumps(value, option=_ORJSON_OPTIONS).decode()
    except TypeError:

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


def describe_database_error(exc: Exception) -> str:
    """One sentence for a database error a command or a request met: the driver's own
    first line (``database is locked``), never the statement or its parameters, which
    SQLAlchemy's text of the error carries."""
    orig = getattr(exc, "orig", None)
    first = (str(orig) if orig is not None else type(exc).__name__).strip().splitlines()
    reason = first[0].rstrip(".") if first else type(exc).__name__
    return f"the database refused the request ({reason}); nothing was changed."


def require_schema(engine: Engine) -> None:
    """Raise :class:`StoreError` when the schema is missing, saying how to create it."""
    if not has_schema(engine):
        shown = engine.url.render_as_string(hide_password=True)
        raise StoreError(
            f"database {shown} has no whirlwatch tables; run `whirlwatch db upgrade --database {shown}` first."
        )


def hold_write_lock(connection: Connection) -> None:
    """On SQLite, take the database's write lock for ``connection``'s transaction now, before
    it reads anything; nothing on other databases.

    A SQLite transaction that reads and then writes cannot wait for the lock: if another
    process committed since its first read, SQLite fails the write at once with "database
    is locked" (SQLITE_BUSY_SNAPSHOT; https://www.sqlite.org/isolation.html). A write that
    matches no row takes the lock before any read, so the wait is the busy handler's.
    (PostgreSQL serialises such writers on row locks taken by their own queries instead.)"""
    if connection.dialect.name == "sqlite":
        # Through SQLAlchemy, so a lock or disk error arrives wrapped as its
        # OperationalError, which the service retries (a raw driver error was taken for a
        # bad reading and set aside).
        connection.exec_driver_sql("UPDATE detector_state SET machine_id = machine_id WHERE 0")


class Store:
    """An engine and its session factory: what the service and the dashboard hold.

    >>> store = Store.open("sqlite:///data/whirlwatch.sqlite")   # doctest: +SKIP
    >>> with store.transaction() as session:                    # doctest: +SKIP
    ...     add_dead_letter(session, topic=topic, reason="not_json")  # committed on exit
    """

    def __init__(self, engine: Engine) -> None:
        self.engine = engine
        self.sessions = session_factory(engine)
        self._gate_path = _writer_gate_path(engine)
        self._gate_fd: int | None = None

    @classmethod
    def open(
        cls, url: str | URL, *, busy_timeout_ms: int = DEFAULT_BUSY_TIMEOUT_MS, check: bool = True,
        silence_limit_s: float | None = None,
    ) -> Store:
        """Open the store at ``url``; with ``check``, fail unless the schema exists.
        ``silence_limit_s``: see :func:`make_engine`."""
        store = cls(make_engine(url, busy_timeout_ms=busy_timeout_ms, silence_limit_s=silence_limit_s))
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
        database's write lock from the start (:func:`hold_write_lock`)."""
        with self.writer_gate(), self.transaction() as session:
            hold_write_lock(session.connection())
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
        return self._gate(self._gate_path)

    @contextmanager
    def _gate(self, path: str) -> Iterator[None]:
        if self._gate_fd is None:
            self._gate_fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
        fcntl.flock(self._gate_fd, fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(self._gate_fd, fcntl.LOCK_UN)

    def close(self) -> None:
        if self._gate_fd is not None:
            os.close(self._gate_fd)
            self._gate_fd = None
        watchdog = watchdog_of(self.engine)
        if watchdog is not None:
            watchdog.stop()
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
