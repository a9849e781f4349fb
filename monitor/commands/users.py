"""``whirlwatch user add|password`` and ``whirlwatch token create|revoke``: logins and API
tokens. Each change is recorded in the audit trail as made by ``local:<login name>``."""

from __future__ import annotations

import sys

import click

from monitor.commands.db import database_options, open_store
from monitor.store.models import ROLES


@click.group("user")
def user() -> None:
    """Dashboard and API users."""


@user.command("add")
@click.argument("name")
@click.option("--role", type=click.Choice(ROLES), default="viewer", show_default=True)
@click.option(
    "--password-stdin",
    is_flag=True,
    help="Read the password from the first line of standard input instead of a prompt.",
)
@database_options
def add_cmd(
    name: str, role: str, password_stdin: bool, database_url: str | None, config_file: str | None
) -> None:
    """Add user NAME with ROLE; the password is asked for (or read from stdin)."""
    from monitor.store.auth import AuthError, create_user

    if password_stdin:
        password = sys.stdin.readline().rstrip("\r\n")
    else:
        password = click.prompt("Password", hide_input=True, confirmation_prompt=True)
    store = open_store(database_url, config_file)
    try:
        with store.transaction() as session:
            create_user(session, name, password, role)
    except AuthError as exc:
        raise click.UsageError(str(exc)) from exc
    finally:
        store.close()
    click.echo(f"added user {name} ({role})", err=True)


@user.command("password")
@click.argument("name")
@click.option(
    "--password-stdin",
    is_flag=True,
    help="Read the new password from the first line of standard input instead of a prompt.",
)
@database_options
def password_cmd(name: str, password_stdin: bool, database_url: str | None, config_file: str | None) -> None:
    """Set a new password for user NAME (an admin who forgot theirs); signs them out everywhere."""
    from monitor.store.auth import AuthError, set_password
    from monitor.store.reads import get_user

    if password_stdin:
        password = sys.stdin.readline().rstrip("\r\n")
    else:
        password = click.prompt("New password", hide_input=True, confirmation_prompt=True)
    store = open_store(database_url, config_file)
    try:
        with store.transaction() as session:
            found = get_user(session, name)
            if found is None:
                raise AuthError(f"no user named {name!r}; add one with `whirlwatch user add`.")
            set_password(session, found, password)
    except AuthError as exc:
        raise click.UsageError(str(exc)) from exc
    finally:
        store.close()
    click.echo(f"password of {name} set; their sessions are signed out", err=True)


@click.group("token")
def token() -> None:
    """API tokens (sent as 'Authorization: Bearer TOKEN')."""


@token.command("create")
@click.option("--user", "user_name", required=True, help="User the token acts as.")
@click.option("--label", default="", help="What the token is for.")
@database_options
def create_cmd(
    user_name: str, label: str, database_url: str | None, config_file: str | None
) -> None:
    """Create an API token and print it alone on standard output (it is stored hashed
    and cannot be shown again)."""
    from monitor.store.auth import AuthError, create_api_token

    store = open_store(database_url, config_file)
    try:
        with store.transaction() as session:
            text = create_api_token(session, user_name, label)
    except AuthError as exc:
        raise click.UsageError(str(exc)) from exc
    finally:
        store.close()
    click.echo(text)


@token.command("revoke")
@click.option(
    "--token-stdin",
    is_flag=True,
    required=True,
    help="Read the token to revoke from the first line of standard input.",
)
@database_options
def revoke_cmd(token_stdin: bool, database_url: str | None, config_file: str | None) -> None:
    """Revoke an API token read from standard input (never from the command line, where
    it would land in shell history)."""
    from monitor.store.auth import revoke_api_token

    text = sys.stdin.readline().strip()
    if not text:
        raise click.UsageError("no token on standard input; pipe the token to revoke.")
    store = open_store(database_url, config_file)
    try:
        with store.transaction() as session:
            revoked = revoke_api_token(session, text)
    finally:
        store.close()
    if not revoked:
        raise click.UsageError("that token is unknown or already revoked.")
    click.echo("token revoked", err=True)
