"""``whirlwatch machines``: import and export the machine registry (TOML <-> database)."""

from __future__ import annotations

import sys

import click

from monitor.commands.db import database_options, open_store


@click.group("machines")
def machines() -> None:
    """The machine registry: machines, measurement points, modes and limits."""


class _DryRun(Exception):
    """Rolls a dry run's transaction back."""


@machines.command("import")
@click.argument("file", type=click.Path(dir_okay=False))
@database_options
@click.option(
    "--user",
    default="registry import",
    show_default=True,
    help="Name recorded in the mode history.",
)
@click.option("--replace", is_flag=True,
              help="Also remove what FILE leaves out: machines and points are retired, modes "
                   "deleted (each named in the output).")
@click.option("--dry-run", is_flag=True, help="Say what the import would change; change nothing.")
def import_cmd(file: str, database_url: str | None, config_file: str | None, user: str,
               replace: bool, dry_run: bool) -> None:
    """Add and update the machines, points and modes FILE names. What FILE leaves out is
    kept (e.g. modes added in the dashboard) unless --replace is given."""
    from monitor.model.registry import RegistryError
    from monitor.model.registry_file import load_registry, registry_warnings
    from monitor.store.registry_sync import import_registry

    try:
        registry = load_registry(file)
    except RegistryError as exc:
        raise click.UsageError(str(exc)) from exc
    for w in registry_warnings(registry):
        click.echo(f"warning: {file}: {w}", err=True)
    store = open_store(database_url, config_file)
    try:
        with store.transaction() as session:
            report = import_registry(session, registry, user=user, replace=replace)
            if dry_run:
                raise _DryRun
    except _DryRun:
        pass
    finally:
        store.close()
    verb = "would import" if dry_run else "imported"
    click.echo(f"{verb} {file}: {report.summary()}", err=True)
    for line in report.details():
        click.echo(f"  {line}", err=True)


@machines.command("export")
@click.argument("file", type=click.Path(dir_okay=False), required=False)
@database_options
def export_cmd(file: str | None, database_url: str | None, config_file: str | None) -> None:
    """Write the registry as TOML to FILE (or standard output). Stored values outside the
    registry's bounds (left by an older release) are left out, each named on stderr."""
    from monitor.model.registry_file import dump_registry
    from monitor.store.registry_sync import read_registry

    store = open_store(database_url, config_file)
    try:
        with store.session() as session:
            registry, problems = read_registry(session)
    finally:
        store.close()
    for p in problems:
        click.echo(f"warning: {p}", err=True)
    text = dump_registry(registry)
    if file is None:
        sys.stdout.write(text)
    else:
        with open(file, "w", encoding="utf-8") as fh:
            fh.write(text)
        click.echo(f"wrote {file}", err=True)
