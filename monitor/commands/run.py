"""``whirlwatch run``: the service (MQTT in, analysis, detection, store, MQTT out)."""

from __future__ import annotations

from pathlib import Path

import click


@click.command("run")
@click.option("--config", "config", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Service file (TOML); see docs/configuration.md.")
@click.option("--broker", default=None, metavar="URL", help="Broker URL (mqtt:// or mqtts://); overrides the file.")
@click.option("--database", default=None, metavar="URL", help="SQLAlchemy URL of the store; overrides the file.")
@click.option("--machines", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Machine registry TOML whose changed entries are added/updated at start "
                   "(nothing deleted; docs/registry.md); overrides the file.")
@click.option("--client-id", default=None, help="MQTT client id (stable per process); overrides the file.")
@click.option("--shared-group", default=None, help="Shared-subscription group; overrides the file.")
@click.option("--metrics", "metrics_address", default=None, metavar="HOST:PORT",
              help="Serve /metrics and /healthz here; overrides the file.")
def run(config: Path | None, broker: str | None, database: str | None, machines: Path | None,
        client_id: str | None, shared_group: str | None, metrics_address: str | None) -> None:
    """Run the service until SIGTERM or Ctrl-C (finishes in-flight work, then stops)."""
    from monitor.config import ConfigError, load_settings
    from monitor.io.mqtt_names import MqttConfigError
    from monitor.service.logs import configure_logging
    from monitor.service.runner import run_service
    from monitor.service.service import Service, ServiceError
    from monitor.store.db import StoreError

    if config is not None and not config.is_file():
        raise click.UsageError(f"--config {str(config)!r} is not a file.")
    if machines is not None and not machines.is_file():
        raise click.UsageError(f"--machines {str(machines)!r} is not a file.")
    try:
        settings = load_settings(config, overrides={
            "broker.url": broker, "database.url": database,
            "service.machines_file": str(machines.resolve()) if machines else None,
            "broker.client_id": client_id, "broker.shared_group": shared_group,
            "service.metrics_address": metrics_address,
        })
    except ConfigError as exc:
        raise click.ClickException(str(exc)) from None
    configure_logging(settings.service.log_level)
    try:
        service = Service(settings)
        run_service(service)
    except (ServiceError, StoreError, MqttConfigError) as exc:
        raise click.ClickException(str(exc)) from None
