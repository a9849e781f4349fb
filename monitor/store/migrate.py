"""Schema migrations (Alembic) run from inside the package: no external alembic.ini."""

from __future__ import annotations

from pathlib import Path

from alembic import command
from alembic.config import Config
from sqlalchemy import Engine

from monitor.store.db import make_engine

MIGRATIONS_DIR = Path(__file__).with_name("migrations")


def alembic_config(url: str | None = None) -> Config:
    """An Alembic ``Config`` pointing at the shipped migrations (and ``url`` if given)."""
    cfg = Config(str(MIGRATIONS_DIR / "alembic.ini"))
    cfg.set_main_option("script_location", str(MIGRATIONS_DIR))
    if url is not None:
        # Through attributes, not set_main_option: '%' in passwords would break the ini parser.
        cfg.attributes["url"] = str(url)
    return cfg


def upgrade(url: str, revision: str = "head") -> None:
    """Bring the database at ``url`` up to ``revision`` (default: the newest)."""
    engine = make_engine(url)
    try:
        upgrade_engine(engine, revision)
    finally:
        engine.dispose()


def upgrade_engine(engine: Engine, revision: str = "head") -> None:
    """Like :func:`upgrade` on an existing engine."""
    cfg = alembic_config()
    with engine.connect() as conn:
        cfg.attributes["connection"] = conn
        command.upgrade(cfg, revision)
        conn.commit()


def current_revision(engine: Engine) -> str | None:
    """The revision the database is at, or None when it has never been migrated."""
    from alembic.runtime.migration import MigrationContext

    with engine.connect() as conn:
        return MigrationContext.configure(conn).get_current_revision()
