"""``whirlwatch db``: create or upgrade the store's schema, thin old data."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any, TypeVar

import click

from monitor.config import ConfigError, load_settings
from monitor.settings import Settings

if TYPE_CHECKING:
    from monitor.store.db import Store

F = TypeVar("F", bound=Callable[..., Any])


def database_options(f: F) -> F:
    """``--database URL`` and ``--config FILE`` (the URL wins; else the service file,
    the environment and the default SQLite file, in that order)."""
    f = click.option(
        "--config",
        "config_file",
        type=click.Path(dir_okay=False),
        default=None,
        help="Service file (TOML) to take the database URL from.",
    )(f)
    f = click.option(
        "--database",
        "database_url",
        metavar="URL",
        default=None,
        help="SQLAlchemy database URL (sqlite:///FILE or postgresql+psycopg://...).",
    )(f)
    return f


def command_settings(database_url: str | None, config_file: str | None) -> Settings:
    """The settings of a command: the service file (if any), the environment, and
    ``--database`` over both; UsageError on a bad file."""
    try:
        return load_settings(config_file, overrides={"database.url": database_url})
    except ConfigError as exc:
        raise click.UsageError(str(exc)) from exc


def resolve_database_url(database_url: str | None, config_file: str | None) -> str:
    """The database URL from the flag, else from the settings; UsageError on a bad file."""
    return command_settings(database_url, config_file).database.url


def open_store(database_url: str | None, config_file: str | None) -> Store:
    """Open the store for a command; ClickException with the fix when the schema is missing."""
    return _open(command_settings(database_url, config_file))


def _open(settings: Settings) -> Store:
    from monitor.store.db import Store, StoreError

    try:
        # A locked SQLite file is waited for as long as the settings say (database.busy_timeout_ms).
        return Store.open(settings.database.url, busy_timeout_ms=settings.database.busy_timeout_ms)
    except StoreError as exc:
        raise click.ClickException(str(exc)) from exc


@click.group("db")
def db() -> None:
    """The SQL store: schema and housekeeping."""


@db.command("upgrade")
@database_options
@click.option("--revision", default="head", show_default=True, help="Target schema revision.")
def upgrade_cmd(database_url: str | None, config_file: str | None, revision: str) -> None:
    """Create the tables or bring them up to the newest schema."""
    from sqlalchemy.exc import OperationalError

    from monitor.store.db import StoreError, make_engine
    from monitor.store.migrate import current_revision, upgrade_engine

    url = resolve_database_url(database_url, config_file)
    try:
        engine = make_engine(url)
    except StoreError as exc:
        raise click.UsageError(str(exc)) from exc
    shown = engine.url.render_as_string(hide_password=True)
    try:
        upgrade_engine(engine, revision)
        click.echo(f"database {shown} is at schema revision {current_revision(engine)}", err=True)
    except OperationalError as exc:
        raise click.ClickException(f"cannot reach database {shown}: {exc.orig}") from exc
    finally:
        engine.dispose()


@db.command("thin")
@database_options
def thin_cmd(database_url: str | None, config_file: str | None) -> None:
    """Apply the retention policy once (alarm history is never deleted)."""
    from monitor.store.retention import apply_retention

    settings = command_settings(database_url, config_file)
    store = _open(settings)
    try:
        with store.transaction() as session:
            result = apply_retention(session, settings.retention.policy())
    finally:
        store.close()
    click.echo(
        f"deleted {result.measurements} measurements, {result.speed_readings} speed readings, "
        f"{result.spectrum_snapshots} spectra, {result.waveform_snapshots} waveforms, "
        f"{result.dead_letters} dead letters",
        err=True,
    )


@db.command("backup")
@database_options
@click.argument("file", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--force", is_flag=True, default=False, help="Replace FILE if it exists.")
def backup_cmd(database_url: str | None, config_file: str | None, file: Path, force: bool) -> None:
    """Copy the store into FILE while the service runs (SQLite: the online backup API;
    PostgreSQL: pg_dump's custom format; docs/deploy.md)."""
    from monitor.store.backup import BackupError, backup
    from monitor.store.db import StoreError

    url = resolve_database_url(database_url, config_file)
    try:
        revision = backup(url, file, force=force)
    except (BackupError, StoreError) as exc:
        raise click.ClickException(str(exc)) from None
    click.echo(f"backed up the store at schema revision {revision} into {file}", err=True)


@db.command("restore")
@database_options
@click.argument("file", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--force", is_flag=True, default=False,
              help="Replace a store that already holds data (everything in it is lost).")
def restore_cmd(database_url: str | None, config_file: str | None, file: Path, force: bool) -> None:
    """Restore the store from FILE (made by `db backup`), then bring it to the newest
    schema; refuses a store that holds data unless --force. Stop the service first."""
    from monitor.store.backup import BackupError, restore
    from monitor.store.db import StoreError

    url = resolve_database_url(database_url, config_file)
    try:
        done = restore(url, file, force=force)
    except (BackupError, StoreError) as exc:
        raise click.ClickException(str(exc)) from None
    click.echo(f"restored {file} (schema revision {done.file_revision}); the store is at "
               f"schema revision {done.store_revision}", err=True)
