"""``whirlwatch analyse FILE``: analyse every waveform of a stream file.

Each line goes through ``monitor.io.ingest.decode_message``, so a file is validated exactly
like live MQTT traffic (the freshness check excepted: a recording is old by nature).
A waveform without its own speed takes the latest speed reading of its machine when that
reading is at most :data:`SPEED_MATCH_S` seconds away; otherwise the analysis estimates
the speed from the spectrum. Rejected lines are counted by reason and reported on stderr.
"""

from __future__ import annotations

import dataclasses
import json
import math
import sys
from collections import Counter
from collections.abc import Iterator
from pathlib import Path

import click

from monitor.analysis.waveform import ReadingAnalysis, analyse_waveform, analysis_to_json
from monitor.io.ingest import SPEED_STREAM, decode_message
from monitor.io.ingest_limits import IngestLimits, Rejected
from monitor.io.streams import DEFAULT_PREFIX, StreamError, read_stream
from monitor.model.jsonsafe import jsonable
from monitor.model.readings import SpeedReading, Waveform
from monitor.model.registry import Registry, RegistryError
from monitor.model.registry_file import load_registry
from monitor.model.timefmt import iso_utc

#: Largest gap (s) between a speed reading and a waveform for the speed to count as
#: measured for that waveform.
SPEED_MATCH_S = 5.0

# A file is a recording: any age is fine, every other check is the live one.
FILE_LIMITS = IngestLimits(max_age_s=math.inf, max_future_s=math.inf)


@dataclasses.dataclass
class Outcome:
    """Counts of a pass over a stream file (for the summary on stderr); shared by the
    commands that read stream files (analyse, bumptest, passage)."""

    seen: int = 0
    accepted: int = 0
    rejected: Counter[str] = dataclasses.field(default_factory=Counter)
    examples: dict[str, str] = dataclasses.field(default_factory=dict)

    def reject(self, reason: str, detail: str) -> None:
        self.rejected[reason] += 1
        self.examples.setdefault(reason, detail)

    def report(self, what: str) -> None:
        n_rej = sum(self.rejected.values())
        click.echo(f"{self.accepted} {what}, {n_rej} messages rejected.", err=True)
        for reason, count in sorted(self.rejected.items()):
            click.echo(f"  rejected {count} x {reason}: e.g. {self.examples[reason]}", err=True)


def analyse_stream(
    path: Path, registry: Registry, *, prefix: str = DEFAULT_PREFIX, outcome: Outcome | None = None
) -> Iterator[ReadingAnalysis]:
    """Analyses of every accepted waveform of stream file ``path``, in file order.

    Rejections (malformed lines, messages ingest refuses, waveforms the analysis refuses)
    are counted in ``outcome``; nothing here raises for bad content.
    """
    out = outcome if outcome is not None else Outcome()
    last_ts: dict[tuple[str, str], float] = {}
    latest_speed: dict[str, SpeedReading] = {}
    machines = registry.by_id()

    def on_error(exc: StreamError) -> None:
        out.seen += 1
        out.reject("malformed_line", str(exc))

    for topic, payload in read_stream(path, on_error=on_error):
        out.seen += 1
        try:
            reading = decode_message(
                topic, payload, registry, prefix=prefix,
                last_ts=lambda m, p: last_ts.get((m, p)), limits=FILE_LIMITS,
            )
        except Rejected as exc:
            out.reject(exc.reason, exc.detail)
            continue
        if isinstance(reading, SpeedReading):
            last_ts[(reading.machine, SPEED_STREAM)] = reading.ts
            latest_speed[reading.machine] = reading
            continue
        assert isinstance(reading, Waveform)
        last_ts[(reading.machine, reading.point)] = reading.ts
        if reading.speed_hz is None:
            sr = latest_speed.get(reading.machine)
            if sr is not None and abs(reading.ts - sr.ts) <= SPEED_MATCH_S and sr.speed_hz > 0:
                reading = dataclasses.replace(reading, speed_hz=sr.speed_hz)
        machine = machines[reading.machine]
        try:
            analysis = analyse_waveform(reading, machine, machine.point(reading.point))
        except ValueError as exc:
            out.reject("analysis_refused", str(exc))
            continue
        out.accepted += 1
        yield analysis


def format_or_dash(v: float | None, spec: str = ".3g") -> str:
    """``v`` formatted with ``spec``, or ``-`` when there is none (None, NaN, inf): the
    empty cell of every table the stream-file commands print."""
    return "-" if v is None or not math.isfinite(v) else format(v, spec)


def _table_row(a: ReadingAnalysis) -> str:
    one, two = a.order(1.0), a.order(2.0)
    unit = a.spectrum.unit
    peaks = ", ".join(f"{p.hz:.1f} Hz {p.amplitude:.3g}" for p in a.peaks[:3])
    return (
        f"{iso_utc(a.ts, timespec='milliseconds'):24}  {a.machine + '/' + a.point:16}  "
        f"{a.speed_hz:8.2f}  {a.speed_source:10}  {a.overall_velocity_mm_s_rms:10.2f}  "
        f"{format_or_dash(one.velocity_mm_s if one else None, '.2f'):>10}  "
        f"{format_or_dash(two.velocity_mm_s if two else None, '.2f'):>10}  "
        f"{peaks}{f' ({unit} pk)' if peaks else ''}"
    )


#: The table's columns; README.md, "Analysing a stream file", explains each.
_HEADER = (
    f"{'time (UTC)':24}  {'machine/point':16}  {'speed Hz':>8}  {'speed from':10}  "
    f"{'mm/s RMS':>10}  {'1x mm/s pk':>10}  {'2x mm/s pk':>10}  largest peaks (sensor unit, peak)"
)


def count_lines(path: Path) -> int:
    """Lines of ``path`` (the progress bar's length), read in 1 MiB chunks."""
    n = 0
    with path.open("rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            n += chunk.count(b"\n")
    return n


@click.command("analyse")
@click.argument("file", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--machines", "machines_file", required=True,
              type=click.Path(dir_okay=False, path_type=Path),
              help="Machine registry (TOML) that names the machines and points of the file.")
@click.option("--json", "as_json", is_flag=True,
              help="One JSON object per analysed waveform instead of a table.")
@click.option("--prefix", default=DEFAULT_PREFIX, show_default=True, help="MQTT topic prefix.")
def analyse(file: Path, machines_file: Path, as_json: bool, prefix: str) -> None:
    """Analyse every waveform of stream FILE (.jsonl): speed and where it came from,
    overall velocity (mm/s RMS), 1x and 2x (mm/s peak) and the largest peaks (sensor unit),
    one line per reading. Exits with 1 when every message of the file was rejected."""
    if not file.is_file():
        raise click.UsageError(f"stream file {str(file)!r} does not exist or is not a file.")
    if not machines_file.is_file():
        raise click.UsageError(f"machine registry {str(machines_file)!r} does not exist.")
    try:
        registry = load_registry(machines_file)
    except RegistryError as exc:
        raise click.ClickException(str(exc)) from exc
    try:
        total = count_lines(file)
    except OSError as exc:
        raise click.ClickException(f"cannot read stream file {str(file)!r}: {exc.strerror}.") from exc
    outcome = Outcome()
    err = sys.stderr
    if not as_json:
        click.echo(_HEADER)
    last_count = 0
    with click.progressbar(length=total, label="analysing", file=err) as bar:
        for a in analyse_stream(file, registry, prefix=prefix, outcome=outcome):
            if as_json:
                record = jsonable(analysis_to_json(a))
                click.echo(json.dumps(record, separators=(",", ":"), allow_nan=False))
            else:
                click.echo(_table_row(a))
            bar.update(outcome.seen - last_count)
            last_count = outcome.seen
        bar.update(total - last_count)
    outcome.report("waveforms analysed")
    if outcome.seen and sum(outcome.rejected.values()) == outcome.seen:
        # Nothing usable in the file is an error a script must see (exit status 1).
        raise click.ClickException(f"every message of {str(file)!r} was rejected (reasons above).")
