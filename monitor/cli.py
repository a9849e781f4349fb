"""The ``whirlwatch`` command line: one group, one sub-command per job.

Sub-commands live beside the code they drive and are attached here, so this module
stays a table of contents. Mistakes are reported as ``click.UsageError`` /
``click.ClickException`` in one sentence naming the bad input.
"""

from __future__ import annotations

import os

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
    """The command group; no traceback reaches the user: an error a command did not turn
    into a one-sentence ``click`` error becomes one here."""

    def invoke(self, ctx: click.Context) -> object:
        try:
            return super().invoke(ctx)
        except (click.ClickException, click.exceptions.Exit, click.Abort):
            raise
        except Exception as exc:
            if os.environ.get(TRACEBACK_ENV) == "1":
                raise
            raise click.ClickException(one_sentence(exc)) from None


@click.group(cls=_Commands, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="whirlwatch")
def main() -> None:
    """whirlwatch: vibration spectra, running speed against natural frequencies,
    resonance-proximity and amplitude-growth alarms."""


def _attach() -> None:
    # Each entry: (module, attribute). Imported here so `whirlwatch --help` lists all.
    from importlib import import_module

    for module, attr in _COMMANDS:
        try:
            mod = import_module(module)
        except ModuleNotFoundError as exc:  # a part not built yet must not break the CLI
            if exc.name and exc.name.startswith("monitor") or exc.name == "dashboard":
                continue
            raise
        main.add_command(getattr(mod, attr))


_COMMANDS: list[tuple[str, str]] = [
    ("monitor.commands.simulate", "simulate"),
    ("monitor.commands.analyse", "analyse"),
    ("monitor.commands.db", "db"),
    ("monitor.commands.machines", "machines"),
    ("monitor.commands.baseline", "baseline"),
    ("monitor.commands.users", "user"),
    ("monitor.commands.users", "token"),
    ("monitor.commands.dashboard", "dashboard"),
    ("monitor.commands.run", "run"),
    ("monitor.commands.demo", "demo"),
    ("monitor.commands.bumptest", "bumptest"),
    ("monitor.commands.passage", "passage"),
]

_attach()
