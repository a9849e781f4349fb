"""The ``whirlwatch`` command line: one group, one sub-command per job.

Sub-commands live beside the code they drive and are attached here, so this module
stays a table of contents. Mistakes are reported as ``click.UsageError`` /
``click.ClickException`` in one sentence naming the bad input.
"""

from __future__ import annotations

import click

from monitor import __version__


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
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
