"""``whirlwatch demo``: broker, store, service, dashboard and the sample plant at once."""

from __future__ import annotations

import logging
import threading
from pathlib import Path

import click


@click.command("demo")
@click.option("--broker", default=None, metavar="URL",
              help="Use this broker instead of starting a private one.")
@click.option("--database", default=None, metavar="URL",
              help="SQLAlchemy URL of the store (default: SQLite in --data-dir).")
@click.option("--machines", type=click.Path(dir_okay=False, exists=True, path_type=Path), default=None,
              help="Machine registry TOML (default: the sample plant).")
@click.option("--for", "duration_s", type=click.FloatRange(1, 86400), default=None,
              help="Stop by itself after this many seconds (default: serve until Ctrl-C).")
@click.option("--data-dir", type=click.Path(file_okay=False, path_type=Path), default=Path("demo-data"),
              show_default=True, help="Folder for the demo's database and broker files.")
@click.option("--host", default="127.0.0.1", show_default=True, help="Dashboard address.")
@click.option("--port", type=click.IntRange(0, 65535), default=8050, show_default=True,
              help="Dashboard port (a free one if taken; 0 = any).")
@click.option("--embedded-broker", is_flag=True, default=False,
              help="Start the in-process amqtt broker (MQTT 3.1.1) even when Mosquitto is installed.")
def demo(broker: str | None, database: str | None, machines: Path | None, duration_s: float | None,
         data_dir: Path, host: str, port: int, embedded_broker: bool) -> None:
    """Run everything on embedded defaults and replay the sample plant, accelerated; keep
    serving the dashboard until Ctrl-C (or --for seconds). Prints an engineer and an admin
    login, and how to open the dashboard on the demo's data again afterwards."""
    from monitor.demo import install_stop_signals, run_demo
    from monitor.service.logs import configure_logging

    if embedded_broker and broker is not None:
        raise click.UsageError("--embedded-broker and --broker exclude each other; give one of them.")
    data_dir.mkdir(parents=True, exist_ok=True)
    log_path = data_dir.resolve() / "whirlwatch.log"
    # The console keeps to progress and where to look; the service's and the dashboard's
    # JSON-line logs go to a file in the data folder.
    with log_path.open("a", encoding="utf-8") as log_file:
        configure_logging("INFO", stream=log_file)
        stop = threading.Event()
        install_stop_signals(stop)
        click.echo(f"data folder: {data_dir.resolve()}")
        click.echo(f"logs: {log_path}")
        try:
            run_demo(data_dir=data_dir, broker_url=broker, database_url=database,
                     machines=machines, duration_s=duration_s, host=host, port=port,
                     say=click.echo, stop=stop, embedded_broker=embedded_broker)
        except RuntimeError as exc:
            raise click.ClickException(str(exc)) from None
        finally:
            logging.getLogger().handlers[:] = []
