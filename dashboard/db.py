"""One SQLAlchemy session per request, closed on teardown."""

from __future__ import annotations

from flask import Flask, current_app, g
from sqlalchemy.orm import Session


def init_app(app: Flask) -> None:
    from monitor.store.db import make_engine, session_factory

    engine = make_engine(app.config["DATABASE_URL"])
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
        g.db_session = current_app.extensions["whirlwatch_sessionmaker"]()
    return g.db_session


def engine():
    return current_app.extensions["whirlwatch_engine"]
