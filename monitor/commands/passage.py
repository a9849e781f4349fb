"""``whirlwatch passage FILE``: resonance passages in the run-ups and coast-downs of a stream.

Every waveform of the machine goes through the same analysis as ``whirlwatch analyse``
(speed from the waveform's once-per-revolution pulses, else from the speed stream, else
estimated from the spectrum); each point's readings, in time order, are split into
sweeps (run-ups and coast-downs, apart from steady running and stops) by the same
tracker a live service uses (:class:`monitor.modes.passage_tracker.PassageTracker`, rules
in :mod:`monitor.modes.sweeps`), and each sweep's 1x amplitude (and phase, when the
waveforms carry once-per-revolution pulses) against speed is searched for passages:
critical speeds, amplification factors (API 684), damping ratios. The passages of all
sweeps are compared with the stored modes and turned into drive skip bands, next to the
skip bands of the stored modes.

With ``--record`` the registry comes from the database and the comparison with the stored
modes is recorded there as ``mode_shift`` alarms (monitor/service/mode_findings.py).
"""

from __future__ import annotations

import dataclasses
import functools
import math
import sys
from collections import defaultdict
from pathlib import Path
from typing import Any

import click
import numpy as np

from monitor.analysis.waveform import ReadingAnalysis
from monitor.commands.analyse import Outcome, analyse_stream, format_or_dash
from monitor.commands.bumptest import (
    check_file,
    comparison_registry,
    emit_point,
    print_comparison,
    record_comparison,
)
from monitor.commands.db import database_options
from monitor.commands.usage import usage_errors
from monitor.model import validate
from monitor.model.jsonsafe import jsonable
from monitor.model.registry import Machine
from monitor.model.timefmt import iso_utc
from monitor.modes.passage_tracker import (
    PASSAGE_SOURCE,
    PassageTracker,
    SweepPassages,
    stop_speed_hz,
)
from monitor.modes.runup import BodeData, Passage, bode_data
from monitor.modes.shift import (
    DEFAULT_SHIFT_TOLERANCE_PCT,
    ModeShift,
    check_tolerance_pct,
    compare_modes,
)
from monitor.modes.skip_bands import SkipBand, machine_skip_bands
from monitor.modes.sweeps import MIN_READINGS, SweepRules

AMPLITUDES = ("velocity", "displacement", "native")


@dataclasses.dataclass(frozen=True)
class PointPassages:
    """One measurement point of the file: ``bode`` all its readings at or above the minimum
    speed (as recorded), ``sweeps`` its run-ups and coast-downs with their passages,
    ``passages`` and ``comparison`` those of every sweep together."""

    machine: str
    point: str
    bode: BodeData
    passages: tuple[Passage, ...]
    comparison: tuple[ModeShift, ...]
    skip_identified: tuple[SkipBand, ...]
    ts: float = math.nan  # time of the latest reading used, epoch s
    readings: int = 0
    sweeps: tuple[SweepPassages, ...] = ()
    sweep_comparisons: tuple[tuple[ModeShift, ...], ...] = ()  # one per sweep


def _amplitude(a: ReadingAnalysis, kind: str) -> tuple[float, float | None, str] | None:
    one = a.order(1.0)
    if one is None:
        return None
    if kind == "velocity":
        return one.velocity_mm_s, one.phase_deg, "mm/s"
    if kind == "displacement":
        # x = v / omega; um from mm/s
        return one.velocity_mm_s / (2 * math.pi * one.frequency_hz) * 1e3, one.phase_deg, "um"
    return one.amplitude, one.phase_deg, a.spectrum.unit


def _compare(machine: Machine, passages: tuple[Passage, ...], tolerance_pct: float) -> tuple[ModeShift, ...]:
    if not machine.modes:
        return ()
    return compare_modes(machine.modes, [p.frequency_hz for p in passages], tolerance_pct=tolerance_pct)


def point_passages(
    machine: Machine, point: str, analyses: list[ReadingAnalysis], *, amplitude: str,
    min_speed_hz: float, tolerance_pct: float, prominence: float,
) -> PointPassages | None:
    """The sweeps and passages of one point's analyses (file order = time order); None
    with fewer than 5 readings at or above ``min_speed_hz`` (Hz), which also counts as
    the stop speed of the sweep rules."""
    values = [(a, _amplitude(a, amplitude)) for a in analyses]
    used = [(a, v) for a, v in values if a.speed_hz >= min_speed_hz and v is not None]
    if len(used) < MIN_READINGS:
        return None
    unit = used[0][1][2]
    phases = [v[1] for _, v in used]
    bode = bode_data(
        np.array([a.speed_hz for a, _ in used]), np.array([v[0] for _, v in used]),
        None if any(p is None for p in phases) else np.array(phases, dtype=float), unit=unit,
    )
    tracker = PassageTracker(SweepRules(stop_hz=min_speed_hz), prominence=prominence, unit=unit)
    sweeps: list[SweepPassages] = []
    for a, v in values:
        sweeps += tracker.update(a.ts, a.speed_hz, None if v is None else v[0],
                                 None if v is None else v[1])
    sweeps += tracker.flush()
    passages = tuple(p for s in sweeps for p in s.passages)
    identified = [p.as_mode(f"{point} passage {i}") for i, p in enumerate(passages, 1)]
    return PointPassages(machine.id, point, bode, passages,
                         _compare(machine, passages, tolerance_pct),
                         machine_skip_bands(machine, identified),
                         max(a.ts for a, _ in used), len(used), tuple(sweeps),
                         tuple(_compare(machine, sp.passages, tolerance_pct) for sp in sweeps))


def _bands_text(bands: tuple[SkipBand, ...]) -> str:
    if not bands:
        return "none"
    return ", ".join(f"{b.low_rpm:.0f}-{b.high_rpm:.0f} r/min ({' '.join(b.causes)})"
                     for b in bands)


def _passages_table(passages: tuple[Passage, ...], indent: str) -> None:
    click.echo(f"{indent}{'#':>2} {'Nc r/min':>9} {'Nc Hz':>8} {'peak':>10} {'N1-N2 r/min':>15} "
               f"{'AF':>6} {'zeta':>7} {'phase@Nc':>9} {'dphase':>7}")
    for i, p in enumerate(passages, 1):
        hp = ("-" if p.half_power_speeds_hz is None else
              f"{p.half_power_speeds_hz[0] * 60:.0f}-{p.half_power_speeds_hz[1] * 60:.0f}")
        click.echo(
            f"{indent}{i:>2} {p.critical_speed_rpm:9.1f} {p.critical_speed_hz:8.3f} "
            f"{p.peak_amplitude:10.4g} {hp:>15} {format_or_dash(p.amplification_factor, '.1f'):>6} "
            f"{format_or_dash(p.damping_ratio, '.4f'):>7} {format_or_dash(p.phase_at_peak_deg, '.1f'):>9} "
            f"{format_or_dash(p.phase_change_deg, '.1f'):>7}"
        )


def print_table(r: PointPassages) -> None:
    b = r.bode
    click.echo(
        f"{r.machine}/{r.point}: {b.speed_hz.size} readings, "
        f"{b.speed_rpm.min():.0f}-{b.speed_rpm.max():.0f} r/min, 1x amplitude in {b.unit} peak, "
        f"{len(r.sweeps)} sweep(s)"
    )
    if not r.sweeps:
        click.echo("  no run-up or coast-down found (steady running only).")
    for i, sp in enumerate(r.sweeps, 1):
        sw = sp.sweep
        click.echo(
            f"  sweep {i}: {sw.kind} {iso_utc(sw.started_at, timespec='seconds')} to "
            f"{iso_utc(sw.ended_at, timespec='seconds')}, {sw.start_speed_hz * 60:.0f} -> "
            f"{sw.end_speed_hz * 60:.0f} r/min at {abs(sw.rate_hz_s) * 60:.1f} r/min/s, "
            f"{len(sw.points)} readings, by {sp.method}"
        )
        if sp.passages:
            _passages_table(sp.passages, "    ")
        else:
            click.echo("    no resonance passage found.")
        for peak, why in sp.rejected:
            click.echo(f"    peak at {peak.critical_speed_rpm:.0f} r/min is no passage: {why}")
    print_comparison(r.comparison, "no passage near it")
    click.echo(f"  skip bands from these passages: {_bands_text(r.skip_identified)}")


def result_json(r: PointPassages, stored_bands: tuple[SkipBand, ...]) -> dict[str, Any]:
    """The ``passage --json`` object of one measurement point (docs/modes.md)."""
    sweeps = [sp.to_json() | {"comparison": [c.to_json() for c in shifts]}
              for sp, shifts in zip(r.sweeps, r.sweep_comparisons, strict=True)]
    return jsonable({
        "machine": r.machine,
        "point": r.point,
        "direction": r.bode.direction,
        "passages": [p.to_json() for p in r.passages],
        "comparison": [c.to_json() for c in r.comparison],
        "skip_bands": {
            "stored_modes": [b.to_json() for b in stored_bands],
            "identified": [b.to_json() for b in r.skip_identified],
        },
        "bode": r.bode.to_json(),
        "sweeps": sweeps,
    })


@click.command("passage")
@click.argument("file", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--machines", "machines_file", default=None,
              type=click.Path(dir_okay=False, path_type=Path),
              help="Machine registry (TOML) with the machine's points, modes and orders "
                   "(required without --record).")
@click.option("--machine", "machine_id", required=True, help="Machine id to analyse.")
@click.option("--amplitude", type=click.Choice(AMPLITUDES), default="velocity",
              show_default=True,
              help="1x amplitude used: velocity (mm/s peak), displacement (um peak) or the "
                   "sensor's own unit.")
@click.option("--min-speed", "min_speed_rpm", type=float, default=None,
              help="Ignore readings below this speed, r/min (default: the machine's minimum "
                   "operating speed / 2).")
@click.option("--prominence", type=float, default=0.3, show_default=True,
              help="A passage's peak must stand out by this fraction of the largest 1x.")
@click.option("--tolerance", "tolerance_pct", type=float, default=DEFAULT_SHIFT_TOLERANCE_PCT,
              show_default=True, help="Mode shift tolerance, percent of the stored frequency.")
@click.option("--json", "as_json", is_flag=True, help="One JSON object per measurement point.")
@click.option("--prefix", default="whirlwatch", show_default=True, help="MQTT topic prefix.")
@click.option("--record", is_flag=True,
              help="Compare with the modes stored in the database and record mode-shift alarms there.")
@database_options
def passage(file: Path, machines_file: Path | None, machine_id: str, amplitude: str,
            min_speed_rpm: float | None, prominence: float, tolerance_pct: float,
            as_json: bool, prefix: str, record: bool, database_url: str | None,
            config_file: str | None) -> None:
    """Find the resonance passages (critical speeds, amplification factors, phase) in the
    run-up or coast-down stream FILE (.jsonl), with drive skip bands."""
    total = check_file(file)
    with usage_errors():
        check_tolerance_pct(tolerance_pct, "--tolerance")
        validate.in_range(prominence, "--prominence", 0.0, 1.0)
        if min_speed_rpm is not None:
            validate.non_negative(min_speed_rpm, "--min-speed")
    if not record and machines_file is None:
        raise click.UsageError("--machines REGISTRY is required (or --record to use the database's).")
    registry, store = comparison_registry(record, machines_file, database_url, config_file)
    assert registry is not None
    try:
        try:
            machine = registry.machine(machine_id)
        except KeyError:
            where = "the database's registry" if store is not None else f"the registry {str(machines_file)!r}"
            raise click.UsageError(f"machine {machine_id!r} is not in {where}.") from None
        _passage(file, total, registry, machine, amplitude, min_speed_rpm, prominence,
                 tolerance_pct, as_json, prefix, store)
    finally:
        if store is not None:
            store.close()


def _passage(file: Path, total: int, registry: Any, machine: Machine, amplitude: str,
             min_speed_rpm: float | None, prominence: float, tolerance_pct: float,
             as_json: bool, prefix: str, store: Any) -> None:
    machine_id = machine.id
    min_hz = stop_speed_hz(machine) if min_speed_rpm is None else min_speed_rpm / 60.0
    outcome = Outcome()
    by_point: dict[str, list[ReadingAnalysis]] = defaultdict(list)
    last = 0
    with click.progressbar(length=total, label="analysing", file=sys.stderr) as bar:
        for a in analyse_stream(file, registry, prefix=prefix, outcome=outcome):
            if a.machine == machine_id:
                by_point[a.point].append(a)
            bar.update(outcome.seen - last)
            last = outcome.seen
        bar.update(total - last)
    if not by_point:
        raise click.ClickException(
            f"stream file {str(file)!r} holds no waveform of machine {machine_id!r} that "
            "could be analysed."
        )
    stored_bands = machine_skip_bands(machine)
    found = 0
    for point in sorted(by_point):
        try:
            r = point_passages(machine, point, by_point[point], amplitude=amplitude,
                               min_speed_hz=min_hz, tolerance_pct=tolerance_pct,
                               prominence=prominence)
        except ValueError as exc:
            click.echo(f"{machine_id}/{point}: skipped, {exc}", err=True)
            continue
        if r is None:
            click.echo(f"{machine_id}/{point}: fewer than 5 readings above "
                       f"{min_hz * 60:.0f} r/min; no passage analysis.", err=True)
            continue
        found += 1
        transitions = record_comparison(store, machine, r.comparison, r.ts, point,
                                        {"source": PASSAGE_SOURCE, "file": file.name,
                                         "readings": r.readings, "sweeps": len(r.sweeps)})
        emit_point(result_json(r, stored_bands) if as_json else None, functools.partial(print_table, r),
                   transitions, recording=store is not None)
    if not as_json:
        click.echo(f"skip bands from the stored modes: {_bands_text(stored_bands)}")
    outcome.report("waveforms analysed")
