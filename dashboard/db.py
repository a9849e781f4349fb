"""One SQLAlchemy session per request, closed on teardown.

A request that may write (any method but GET, HEAD and OPTIONS) holds SQLite's write lock
from the start of its transaction, so it waits for the service's batch (up to the busy
timeout) instead of failing at its first write because the service committed after its
first read (monitor/store/db.py, ``hold_write_lock``)."""

from __future__ import annotations

from flask import Flask, current_app, g, has_request_context, request
from sqlalchemy import Connection, event
from sqlalchemy.orm import Session

from dashboard.errors import NotFound
from monitor.store import reads
from monitor.store.db import hold_write_lock
from monitor.store.models import Machine

#: Methods that never change anything (RFC 9110, section 9.2.1, "safe methods").
READ_METHODS = frozenset({"GET", "HEAD", "OPTIONS"})


def init_app(app: Flask) -> None:
    from monitor.store.db import make_engine, session_factory

    engine = make_engine(app.config["DATABASE_URL"], busy_timeout_ms=app.config["DATABASE_BUSY_TIMEOUT_MS"])
    app.extensions["whirlwatch_engine"] = engine
    app.extensions["whirlwatch_sessionmaker"] = session_factory(engine)

    @app.teardown_appcontext
    def _close(exc: BaseException | None) -> None:
        s = g.pop("db_session", None)
        if s is not None:
            if exc is not None:
                s.rollback()
            s.close()


def db_session() -> Session:
    """The request's session, opened on first use."""
    if "db_session" not in g:
        session = current_app.extensions["whirlwatch_sessionmaker"]()
        if has_request_context() and request.method not in READ_METHODS:
            # Every transaction of a writing request, also one begun after a commit.
            event.listen(session, "after_begin", _hold_write_lock)
        g.db_session = session
    return g.db_session


def _hold_write_lock(_session: Session, _transaction: object, connection: Connection) -> None:
    hold_write_lock(connection)


def engine():
    return current_app.extensions["whirlwatch_engine"]


def machine_or_404(machine_id: str) -> Machine:
    """The machine ``machine_id`` from the request's session; NotFound when there is none."""
    m = reads.get_machine(db_session(), machine_id)
    if m is None:
        raise NotFound(f"No machine with id {machine_id!r}.")
    return m
