"""``whirlwatch simulate``: write synthetic stream files from the physics-based simulator.

Scenarios
---------
``plant``
    The demo plant of ``sample_streams/`` (an invented water treatment works, six weeks
    from 2026-03-02): writes ``plant.toml`` and one ``<machine>.jsonl`` per machine.
``steady``, ``ramp``, ``steps``, ``run-up``, ``coast-down``
    One synthetic test rig (machine ``rig-1``, one accelerometer, one structural mode)
    driven along that speed profile: writes ``rig.toml`` and ``rig-1.jsonl``.

The scenarios themselves live in :mod:`monitor.sim.scenarios`; the same seed gives
byte-identical files.
"""

from __future__ import annotations

import heapq
import sys
from collections.abc import Iterator
from pathlib import Path

import click
import numpy as np

from monitor.commands.usage import usage_errors
from monitor.io.streams import DEFAULT_PREFIX, write_stream
from monitor.model import validate
from monitor.model.registry import Registry
from monitor.model.registry_file import dump_registry
from monitor.sim.scenarios import (
    DEFAULT_SEED,
    RIG_PROFILES,
    Message,
    Plan,
    machine_messages,
    plant_plans,
    rig_plan,
)

# ----------------------------------------------------------------------------- command




@click.command("simulate")
@click.option("--out", "out_dir", default=None, type=click.Path(file_okay=False, path_type=Path),
              help="Directory for the stream files (.jsonl) and the registry (.toml).")
@click.option("--broker", default=None, metavar="URL",
              help="Publish the traffic to this broker (mqtt:// or mqtts://) instead of, or "
                   "as well as, writing files.")
@click.option("--speedup", type=float, default=1.0, show_default=True,
              help="With --broker: play this many times faster than real time (0 = as fast "
                   "as possible); timestamps are moved so the last message is stamped now.")
@click.option("--max-gap", "max_gap_s", type=float, default=None,
              help="With --broker: longest wall-clock wait between two messages, s.")
@click.option("--scenario", type=click.Choice(("plant", *RIG_PROFILES)), default="plant",
              show_default=True,
              help="'plant': the demo plant of sample_streams/; otherwise one test rig "
                   "driven along that speed profile.")
@click.option("--seed", type=int, default=DEFAULT_SEED, show_default=True,
              help="Seed of every random draw; the same seed gives identical files.")
@click.option("--machine", "machine_ids", multiple=True,
              help="Plant scenario: write only this machine (repeatable).")
@click.option("--speed-hz", type=float, default=25.0, show_default=True,
              help="Test rig: top or steady running speed, Hz.")
@click.option("--duration", "duration_s", type=float, default=300.0, show_default=True,
              help="Test rig: length of the speed profile, s.")
@click.option("--prefix", default=DEFAULT_PREFIX, show_default=True, help="MQTT topic prefix.")
def simulate(
    out_dir: Path, scenario: str, seed: int, machine_ids: tuple[str, ...], speed_hz: float,
    duration_s: float, prefix: str, broker: str | None = None, speedup: float = 1.0,
    max_gap_s: float | None = None,
) -> None:
    """Write synthetic vibration and speed streams (.jsonl) plus their machine registry,
    or publish them to a broker (--broker)."""
    if out_dir is None and broker is None:
        raise click.UsageError("give --out DIR to write files or --broker URL to publish (or both).")
    if speedup != 0 and speedup < 1:
        raise click.UsageError(f"--speedup must be 0 (as fast as possible) or >= 1, got {speedup}.")
    if scenario == "plant":
        plans = plant_plans()
        known = [p.machine.id for p in plans]
        unknown = sorted(set(machine_ids) - set(known))
        if unknown:
            raise click.UsageError(
                f"--machine {unknown[0]!r} is not in the plant; choose from {', '.join(known)}."
            )
        registry_name = "plant.toml"
    else:
        with usage_errors():
            validate.in_range(speed_hz, "--speed-hz", 0.0, 500.0, high_open=False, unit=" Hz")
            validate.in_range(duration_s, "--duration", 5.0, 3600.0, low_open=False,
                              high_open=False, unit=" s")
        plans = [rig_plan(scenario, speed_hz, duration_s)]
        registry_name = "rig.toml"
    if broker is not None:
        _publish(plans, seed, machine_ids, prefix, broker, speedup, max_gap_s)
    if out_dir is None:
        return
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise click.ClickException(f"cannot create output directory {str(out_dir)!r}: {exc.strerror}.") from exc
    header = (
        f"# Machine registry of the {'demo plant' if scenario == 'plant' else 'test rig'}, "
        f"written by `whirlwatch simulate --scenario {scenario}`.\n"
    )
    registry = Registry(machines=tuple(p.machine for p in plans))
    (out_dir / registry_name).write_text(header + dump_registry(registry), encoding="utf-8")
    seeds = np.random.SeedSequence(seed).spawn(len(plans))
    selected = [(p, s) for p, s in zip(plans, seeds, strict=True)
                if not machine_ids or p.machine.id in machine_ids]
    total = sum(p.count for p, _ in selected)
    with click.progressbar(length=total, label="simulating", file=sys.stderr) as bar:
        for plan, s in selected:
            path = out_dir / f"{plan.machine.id}.jsonl"

            def counted(plan: Plan = plan, s: np.random.SeedSequence = s) -> Iterator[Message]:
                for _ts, _k, (topic, payload) in machine_messages(plan, s, prefix):
                    if topic.endswith("/waveform"):
                        bar.update(1)
                    yield topic, payload

            try:
                n = write_stream(path, counted())
            except OSError as exc:
                raise click.ClickException(f"cannot write {str(path)!r}: {exc.strerror}.") from exc
            click.echo(f"{path}: {n} messages", err=True)
    click.echo(f"{out_dir / registry_name}: {len(registry.machines)} machines", err=True)


def _publish(plans: list[Plan], seed: int, machine_ids: tuple[str, ...], prefix: str,
             broker: str, speedup: float, max_gap_s: float | None) -> None:
    """Simulate the selected machines, merge in time order and publish at QoS 1."""
    from monitor.io.mqtt_names import MqttConfigError
    from monitor.io.replay import StreamPublisher, replay
    from monitor.redact import redact

    seeds = np.random.SeedSequence(seed).spawn(len(plans))
    streams = [machine_messages(p, s, prefix) for p, s in zip(plans, seeds, strict=True)
               if not machine_ids or p.machine.id in machine_ids]
    messages = [m for _ts, _k, m in heapq.merge(*streams, key=lambda x: (x[0], x[1]))]
    try:
        pub = StreamPublisher(broker)
    except (MqttConfigError, OSError) as exc:
        raise click.ClickException(f"cannot publish to {redact(broker)!r}: {exc}") from None
    try:
        with click.progressbar(length=len(messages), label="publishing", file=sys.stderr) as bar:
            n = replay(messages, pub, speedup=speedup, max_gap_s=max_gap_s,
                       progress=lambda _i, _n: bar.update(1))
    finally:
        pub.close()
    click.echo(f"{redact(broker)}: {n} messages published", err=True)
