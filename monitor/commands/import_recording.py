"""``whirlwatch import FILE``: recorded waveforms (CSV, WAV, Universal File Format data-set
58) as readings, written to a stream file or stored through the service.

The file is read by :mod:`monitor.io.recording_files`; each channel goes to the point
given for it and is cut into blocks, each block one waveform reading as a sensor would
send it (docs/import-export.md). ``--out FILE.jsonl`` writes a stream file
(:mod:`monitor.io.streams`), which ``analyse``, ``bumptest``, ``passage`` and ``demo``
read; ``--store`` hands the readings to the service's own batch path
(:meth:`monitor.service.service.Service.handle_batch`, no broker), which validates,
analyses, evaluates and stores them as it does live traffic, without the age limits (a
recording is old by nature). A file that cannot be used is refused in one sentence naming
it and what is wrong (exit status 1; 2 for a usage mistake).
"""

from __future__ import annotations

import datetime as dt
import json
from collections import Counter
from collections.abc import Callable
from pathlib import Path
from typing import Any, TypeVar

import click

from monitor.commands.analyse import FILE_LIMITS
from monitor.commands.db import command_settings, database_options
from monitor.io.recording import RecordingError
from monitor.io.recording_files import SKIP, ChannelMap, read_recording, to_waveforms
from monitor.io.streams import DEFAULT_PREFIX, parse_ts, reading_message, write_stream
from monitor.model.readings import Waveform

F = TypeVar("F", bound=Callable[..., Any])
#: Readings handed to the service per transaction.
STORE_BATCH = 20


def recording_options(f: F) -> F:
    """The options that say how a recording's channels become readings (import, bumptest)."""
    for opt in reversed((
        click.option("--point", "points", multiple=True, metavar="POINT",
                     help=f"Point of each channel, in the file's order (repeat; '{SKIP}' leaves a channel out)."),
        click.option("--unit", "units", multiple=True, metavar="UNIT",
                     help="Unit of the calibrated samples (m/s^2, g, mm/s, in/s, um, mil; N, kN, lbf for a "
                          "force channel): once for all channels or once per channel; default the file's."),
        click.option("--calibration", "calibrations", multiple=True, type=float, metavar="FACTOR",
                     help="Engineering unit per file unit (WAV: per full scale): once or once per channel; "
                          "default 1."),
        click.option("--fs", "fs_hz", type=float, default=None, metavar="HZ",
                     help="Sample rate of a CSV file without a time column, Hz."),
        click.option("--time-column", default=None, metavar="NAME",
                     help="CSV column of the sample times (header name or 1-based number)."),
        click.option("--start", "start", default=None, metavar="TIME",
                     help="Time of the first sample (ISO 8601 or epoch s); default the file's own, else "
                          "its modification time."),
        click.option("--block-samples", type=click.IntRange(64, 1 << 20), default=None, metavar="N",
                     help="Samples per reading; default the whole channel (blocks of 2^20 when longer)."),
    )):
        f = opt(f)
    return f


def recording_waveforms(file: Path, machine: str, points: tuple[str, ...], units: tuple[str, ...],
                        calibrations: tuple[float, ...], fs_hz: float | None, time_column: str | None,
                        start: str | None, block_samples: int | None) -> list[Waveform]:
    """The waveforms of recording ``file``; ClickException with the reader's one sentence."""
    if not points:
        raise click.UsageError("give the point of each channel of the recording with --point.")
    try:
        start_ts = None if start is None else parse_ts(float(start) if _is_number(start) else start)
    except ValueError:
        raise click.UsageError(f"--start {start!r} is not an ISO 8601 time or epoch seconds.") from None
    if not file.is_file():
        raise click.UsageError(f"recording {str(file)!r} does not exist or is not a file.")
    try:
        rec = read_recording(file, fs_hz=fs_hz, time_column=time_column)
        if start_ts is None and rec.start_ts is None:
            start_ts = file.stat().st_mtime
        chans = ChannelMap(points, units or (None,), calibrations or (1.0,))
        return to_waveforms(rec, machine, chans, start_ts=start_ts, block_samples=block_samples)
    except RecordingError as exc:
        raise click.ClickException(str(exc)) from None


def speed_of(waves: list[Waveform], speed_hz: float | None) -> list[Waveform]:
    if speed_hz is None:
        return waves
    return [Waveform(w.machine, w.point, w.ts, w.fs_hz, w.unit, w.samples, speed_hz=speed_hz) for w in waves]


def messages_of(waves: list[Waveform], prefix: str) -> list[tuple[str, bytes]]:
    """The MQTT messages (topic, payload bytes) of ``waves``, as a sensor would send them."""
    out = []
    for w in waves:
        topic, payload = reading_message(w, prefix)
        out.append((topic, json.dumps(payload, separators=(",", ":")).encode("utf-8")))
    return out


def store_messages(messages: list[tuple[str, bytes]], database_url: str | None,
                   config_file: str | None) -> Counter[str]:
    """Hand ``messages`` to the service's batch path on the configured store; the count of
    each outcome (``waveform``: stored; else the rejection reason)."""
    from monitor.service.service import Service, ServiceError
    from monitor.store.db import StoreError

    settings = command_settings(database_url, config_file)
    try:
        svc = Service(settings, limits=FILE_LIMITS, stale_check_s=0)
    except (ServiceError, StoreError) as exc:
        raise click.ClickException(str(exc)) from None
    counts: Counter[str] = Counter()
    try:
        for b in range(0, len(messages), STORE_BATCH):
            for out in svc.handle_batch(messages[b:b + STORE_BATCH]):
                counts[str(out.kind) if out.reason is None else f"{out.kind}: {out.reason}"] += 1
    finally:
        svc.store.close()
    return counts


@click.command("import")
@click.argument("file", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--machine", "machine_id", required=True, help="Machine the recording belongs to.")
@recording_options
@click.option("--speed-hz", type=click.FloatRange(min=0, max=2000), default=None, metavar="HZ",
              help="Running speed during the recording, Hz (else the analysis estimates it).")
@click.option("--out", "out", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Write a stream file (.jsonl) here.")
@click.option("--store", "to_store", is_flag=True,
              help="Store the readings through the service (database from --database or --config).")
@click.option("--prefix", default=DEFAULT_PREFIX, show_default=True, help="MQTT topic prefix.")
@database_options
def import_recording(file: Path, machine_id: str, points: tuple[str, ...], units: tuple[str, ...],
                     calibrations: tuple[float, ...], fs_hz: float | None, time_column: str | None,
                     start: str | None, block_samples: int | None, speed_hz: float | None,
                     out: Path | None, to_store: bool, prefix: str, database_url: str | None,
                     config_file: str | None) -> None:
    """Import recorded waveforms from FILE (.csv, .wav, .uff/.unv data-set 58) as readings of
    MACHINE's points: into a stream file (--out) or the store (--store)."""
    if (out is None) == (not to_store):
        raise click.UsageError("give either --out FILE.jsonl or --store.")
    waves = speed_of(recording_waveforms(file, machine_id, points, units, calibrations, fs_hz,
                                         time_column, start, block_samples), speed_hz)
    messages = messages_of(waves, prefix)
    span = f"{_when(waves[0].ts)} to {_when(waves[-1].ts)}" if waves else "nothing"
    if out is not None:
        n = write_stream(out, ((t, json.loads(p)) for t, p in messages))
        click.echo(f"{n} readings from {file.name} ({span}) written to {out}.", err=True)
        return
    counts = store_messages(messages, database_url, config_file)
    stored = counts.pop("waveform", 0)
    click.echo(f"{stored} of {len(messages)} readings from {file.name} ({span}) stored.", err=True)
    for what, k in sorted(counts.items()):
        click.echo(f"  not stored {k} x {what}", err=True)
    if not stored:
        raise click.ClickException(f"no reading of {str(file)!r} was stored (reasons above).")


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _when(ts: float) -> str:
    return dt.datetime.fromtimestamp(ts, dt.UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")
