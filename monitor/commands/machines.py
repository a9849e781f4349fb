"""``whirlwatch machines``: import and export the machine registry (TOML <-> database)."""

from __future__ import annotations

import sys

import click

from monitor.commands.db import database_options, open_store


@click.group("machines")
def machines() -> None:
    """The machine registry: machines, measurement points, modes and limits."""


@machines.command("import")
@click.argument("file", type=click.Path(dir_okay=False))
@database_options
@click.option(
    "--user",
    default="registry import",
    show_default=True,
    help="Name recorded in the mode history.",
)
def import_cmd(file: str, database_url: str | None, config_file: str | None, user: str) -> None:
    """Make the database's registry match FILE (machines left out are retired, not deleted)."""
    from monitor.registry import RegistryError, load_registry
    from monitor.store.registry_sync import import_registry

    try:
        registry = load_registry(file)
    except RegistryError as exc:
        raise click.UsageError(str(exc)) from exc
    store = open_store(database_url, config_file)
    try:
        with store.transaction() as session:
            report = import_registry(session, registry, user=user)
    finally:
        store.close()
    click.echo(f"imported {file}: {report.summary()}", err=True)


@machines.command("export")
@click.argument("file", type=click.Path(dir_okay=False), required=False)
@database_options
def export_cmd(file: str | None, database_url: str | None, config_file: str | None) -> None:
    """Write the registry as TOML to FILE (or standard output)."""
    from monitor.registry import dump_registry
    from monitor.store.registry_sync import export_registry

    store = open_store(database_url, config_file)
    try:
        with store.session() as session:
            text = dump_registry(export_registry(session))
    finally:
        store.close()
    if file is None:
        sys.stdout.write(text)
    else:
        with open(file, "w", encoding="utf-8") as fh:
            fh.write(text)
        click.echo(f"wrote {file}", err=True)
