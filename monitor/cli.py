"""The ``whirlwatch`` command line: one group, one sub-command per job.

Sub-commands live beside the code they drive and are attached here, so this module
stays a table of contents. Mistakes are reported as ``click.UsageError`` /
``click.ClickException`` in one sentence naming the bad input.
"""

from __future__ import annotations

import os
from importlib import import_module

import click

from monitor import __version__

#: Set to 1 to see the traceback of an unexpected error instead of its one sentence.
TRACEBACK_ENV = "WHIRLWATCH_TRACEBACK"


def one_sentence(exc: Exception) -> str:
    """What a user is told of an error no command turned into a message of its own: a
    database error by the driver's first line (never the statement or its parameters),
    anything else by its kind only (its text may hold anything)."""
    from sqlalchemy.exc import DBAPIError  # only on the error path: the CLI starts light

    from monitor.store.db import describe_database_error

    if isinstance(exc, DBAPIError):
        return describe_database_error(exc)
    return (f"whirlwatch stopped on an unexpected {type(exc).__name__}; "
            f"set {TRACEBACK_ENV}=1 to see where.")


class _Commands(click.Group):
    """The command group. A sub-command's module is imported when that command is asked
    for (or the help lists them all), so ``whirlwatch db upgrade`` does not load the
    simulator's or the dashboard's libraries. No traceback reaches the user: an error a
    command did not turn into a one-sentence ``click`` error becomes one here."""

    def list_commands(self, ctx: click.Context) -> list[str]:
        return sorted(set(super().list_commands(ctx)) | set(COMMANDS))

    def get_command(self, ctx: click.Context, cmd_name: str) -> click.Command | None:
        if cmd_name in COMMANDS and cmd_name not in self.commands:
            module, attr = COMMANDS[cmd_name]
            self.add_command(getattr(import_module(module), attr), cmd_name)
        return super().get_command(ctx, cmd_name)

    def invoke(self, ctx: click.Context) -> object:
        try:
            return super().invoke(ctx)
        except (click.ClickException, click.exceptions.Exit, click.Abort):
            raise
        except Exception as exc:
            if os.environ.get(TRACEBACK_ENV) == "1":
                raise
            raise click.ClickException(one_sentence(exc)) from None


#: Each sub-command's name -> (module, attribute of its click command).
COMMANDS: dict[str, tuple[str, str]] = {
    "simulate": ("monitor.commands.simulate", "simulate"),
    "analyse": ("monitor.commands.analyse", "analyse"),
    "db": ("monitor.commands.db", "db"),
    "machines": ("monitor.commands.machines", "machines"),
    "baseline": ("monitor.commands.baseline", "baseline"),
    "user": ("monitor.commands.users", "user"),
    "token": ("monitor.commands.users", "token"),
    "dashboard": ("monitor.commands.dashboard", "dashboard"),
    "run": ("monitor.commands.run", "run"),
    "demo": ("monitor.commands.demo", "demo"),
    "bumptest": ("monitor.commands.bumptest", "bumptest"),
    "passage": ("monitor.commands.passage", "passage"),
    "import": ("monitor.commands.import_recording", "import_recording"),
}


@click.group(cls=_Commands, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="whirlwatch")
def main() -> None:
    """whirlwatch: vibration spectra, running speed against natural frequencies,
    resonance-proximity and amplitude-growth alarms."""
