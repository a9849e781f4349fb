"""``whirlwatch baseline restart``: learn a machine's baselines again after maintenance.

The request is recorded in the database (who, when, why, which point); the running
service applies it at its next batch for the machine, or within seconds by its periodic
pass, and the features then show ``baseline_status`` "learning n/N" (docs/alarms.md).
"""

from __future__ import annotations

import getpass

import click

from monitor.commands.db import database_options, open_store


@click.group("baseline")
def baseline() -> None:
    """Learned baselines of amplitude growth."""


def _default_user() -> str:
    try:
        return getpass.getuser()
    except (KeyError, OSError):  # no login name in a bare container
        return "command line"


@baseline.command("restart")
@click.argument("machine")
@click.option("--point", default=None, metavar="ID", help="One measurement point (default: every point).")
@click.option("--comment", required=True, help="Why: the maintenance done (recorded with the request).")
@click.option("--user", default=None, help="Name recorded with the request (default: the login name).")
@database_options
def restart_cmd(machine: str, point: str | None, comment: str, user: str | None,
                database_url: str | None, config_file: str | None) -> None:
    """Ask the service to learn the baselines of MACHINE (or of one --point) again."""
    from monitor.model.registry import RegistryError
    from monitor.store.registry_sync import UnknownEntry, request_baseline_restart

    store = open_store(database_url, config_file)
    try:
        with store.transaction() as session:
            req = request_baseline_restart(session, machine, point, comment, user or _default_user())
            rid, who = req.id, req.requested_by
    except UnknownEntry as exc:
        raise click.UsageError(str(exc)) from exc
    except RegistryError as exc:
        raise click.UsageError(f"--comment: {exc}") from exc
    finally:
        store.close()
    where = f"point {point!r}" if point else "every point"
    click.echo(f"baseline restart {rid} of machine {machine!r}, {where}, recorded for {who}; "
               "a running service applies it within seconds.", err=True)
