"""Alembic environment: runs against ``config.attributes['connection']`` when given,
else the URL from ``config.attributes['url']``, ``-x url=...`` or ``sqlalchemy.url``."""

from __future__ import annotations

from alembic import context

from monitor.store.db import make_engine
from monitor.store.models import Base

config = context.config
target_metadata = Base.metadata


def _url() -> str:
    url = config.attributes.get("url") or context.get_x_argument(as_dictionary=True).get("url")
    url = url or config.get_main_option("sqlalchemy.url")
    if not url:
        raise RuntimeError("no database URL given to the migrations; pass -x url=...")
    return str(url)


def _run(connection) -> None:  # type: ignore[no-untyped-def]
    context.configure(
        connection=connection,
        target_metadata=target_metadata,
        render_as_batch=connection.dialect.name == "sqlite",
        compare_type=True,
    )
    with context.begin_transaction():
        context.run_migrations()


def run_migrations_online() -> None:
    connection = config.attributes.get("connection")
    if connection is not None:
        _run(connection)
        return
    engine = make_engine(_url())
    try:
        with engine.connect() as conn:
            _run(conn)
            conn.commit()
    finally:
        engine.dispose()


if context.is_offline_mode():
    context.configure(url=_url(), target_metadata=target_metadata, literal_binds=True)
    with context.begin_transaction():
        context.run_migrations()
else:
    run_migrations_online()
